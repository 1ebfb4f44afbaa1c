//! What starts a station's run, field by field, for the command line and
//! the console alike: the pack's spec from its three words, each refusal
//! tagged with the field it concerns (a kind, so a screen places it
//! without reading its text), in the same words whichever screen shows
//! it. (A leaf: the session's errors carry its `FieldError`.)

use model::pack::PackSpec;
use serde::Serialize;

/// What a refusal concerns: a field of the console's start form, and the
/// command line's option for it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
pub enum Field {
    PackId,
    Procedure,
    Chemistry,
    Series,
    Rated,
    /// The request as a whole.
    Request,
}

impl Field {
    /// The start form's field name.
    pub fn form_name(self) -> &'static str {
        match self {
            Field::PackId => "pack_id",
            Field::Procedure => "procedure",
            Field::Chemistry => "chemistry",
            Field::Series => "series",
            Field::Rated => "rated",
            Field::Request => "",
        }
    }

    /// The command line's option.
    pub fn option(self) -> &'static str {
        match self {
            Field::PackId => "--pack",
            Field::Procedure => "PROCEDURE",
            Field::Chemistry => "--chemistry",
            Field::Series => "--series",
            Field::Rated => "--rated",
            Field::Request => "",
        }
    }
}

/// A refusal of one field.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{message}")]
pub struct FieldError {
    pub field: Field,
    pub message: String,
}

impl FieldError {
    pub fn new(field: Field, message: impl Into<String>) -> FieldError {
        FieldError {
            field,
            message: message.into(),
        }
    }
}

/// The most cells in series a spec may give.
pub const MAX_SERIES: u32 = 1000;

/// The pack's spec from its chemistry, cells in series and rated capacity
/// as typed (`None` or blank: not given). None of them: no spec (the saved
/// one, or the simulator's); some but not all: refused, naming the first
/// missing.
pub fn pack_spec(
    chemistry: Option<&str>,
    series: Option<&str>,
    rated: Option<&str>,
) -> Result<Option<PackSpec>, FieldError> {
    fn given(v: Option<&str>) -> Option<&str> {
        v.map(str::trim).filter(|t| !t.is_empty())
    }
    let (c, s, r) = (given(chemistry), given(series), given(rated));
    if c.is_none() && s.is_none() && r.is_none() {
        return Ok(None);
    }
    let missing: Vec<Field> = [(Field::Chemistry, c), (Field::Series, s), (Field::Rated, r)]
        .iter()
        .filter(|(_, v)| v.is_none())
        .map(|(f, _)| *f)
        .collect();
    if let Some(first) = missing.first() {
        let names: Vec<&str> = missing.iter().map(|f| f.form_name()).collect();
        return Err(FieldError::new(
            *first,
            format!(
                "a pack spec needs its chemistry, series and rated capacity: {} not given",
                names.join(", ")
            ),
        ));
    }
    let (c, s, r) = (
        c.unwrap_or_default(),
        s.unwrap_or_default(),
        r.unwrap_or_default(),
    );
    let chemistry = c
        .parse()
        .map_err(|e: String| FieldError::new(Field::Chemistry, e))?;
    let series: u32 = s
        .parse()
        .ok()
        .filter(|n| (1..=MAX_SERIES).contains(n))
        .ok_or_else(|| {
            FieldError::new(
                Field::Series,
                format!("'{s}' is not a number of cells in series (1 to {MAX_SERIES})"),
            )
        })?;
    let rated = model::units::capacity_ah(r)
        .map_err(|e| FieldError::new(Field::Rated, format!("'{r}': {e}")))?;
    let spec = PackSpec {
        chemistry,
        series,
        rated_capacity_ah: rated,
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    };
    spec.check().map_err(|e| FieldError::new(Field::Rated, e))?;
    Ok(Some(spec))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Each refusal names its field by kind.
    #[test]
    fn each_refusal_names_its_field() {
        assert_eq!(pack_spec(None, Some(" "), None), Ok(None));
        let s = pack_spec(Some("li-ion"), Some("10"), Some("14Ah"))
            .unwrap()
            .unwrap();
        assert_eq!((s.series, s.rated_capacity_ah), (10, 14.0));
        let field = |c, s, r| pack_spec(c, s, r).unwrap_err().field;
        assert_eq!(
            field(Some("nicd"), Some("10"), Some("14Ah")),
            Field::Chemistry
        );
        assert_eq!(
            field(Some("li-ion"), Some("0"), Some("14Ah")),
            Field::Series
        );
        assert_eq!(
            field(Some("li-ion"), Some("1001"), Some("14Ah")),
            Field::Series
        );
        assert_eq!(field(Some("li-ion"), Some("10"), Some("14V")), Field::Rated);
        assert_eq!(field(Some("li-ion"), None, Some("14Ah")), Field::Series);
        let e = pack_spec(Some("li-ion"), None, None).unwrap_err();
        assert_eq!(e.field, Field::Series);
        assert!(e.message.ends_with("series, rated not given"), "{e}");
    }
}
