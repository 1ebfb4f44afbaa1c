//! The SCPI vocabulary packbench speaks: the one home of the command tree's
//! mnemonics, written in the standard's notation (`[SOURce:]VOLTage[:LEVel]`
//! with optional nodes in brackets and the short form in capitals), and the
//! IEEE 488.2 / SCPI-1999 message rules (compound units, header path, short
//! and long forms, case). The built-in profiles render commands from this
//! tree; the simulated instruments parse incoming text against it, so the
//! two cannot drift (a test checks every built-in template parses here).

use std::sync::OnceLock;

/// Every command the simulated instruments understand.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Cmd {
    Idn,
    Rst,
    Cls,
    Opc,
    Wai,
    Esr,
    Ese,
    Stb,
    Sre,
    Tst,
    SystemError,
    SystemErrorCount,
    SystemVersion,
    Voltage,
    Current,
    Power,
    Resistance,
    Function,
    Output,
    Input,
    MeasureVoltage,
    MeasureCurrent,
    MeasurePower,
    MeasureTemperature,
    /// `ROUTe:SCAN <channel list>`: the channels a `READ?` scans.
    RouteScan,
    /// `CONFigure:VOLTage[:DC] <list>` / `CONFigure:TEMPerature ...,<list>`.
    Configure,
    /// `INITiate`: start a scan (its readings are fetched with `FETCh?`).
    Initiate,
    /// `READ?`: scan the scan list and return every reading.
    ReadScan,
    /// `FETCh?`: the readings of the last scan.
    FetchScan,
    /// A protection level: over-voltage, over-current, over-power, and a
    /// load's under-voltage switch-off.
    ProtectionLevel(Protect),
    /// `...:PROTection:STATe`: the protection armed or not.
    ProtectionState(Protect),
    /// `...:PROTection:TRIPped?`
    ProtectionTripped(Protect),
    /// `...:PROTection:CLEar` and `OUTPut|INPut:PROTection:CLEar`: re-arm
    /// every latched protection once its cause is gone.
    ProtectionClear,
    /// A load's voltage-on threshold: it sinks nothing until its input
    /// reaches this voltage.
    VoltageOn,
    /// `STATus:OPERation|QUEStionable:CONDition?`
    StatusCondition(Register),
    /// `STATus:OPERation|QUEStionable[:EVENt]?`
    StatusEvent(Register),
    /// `STATus:...:ENABle`
    StatusEnable(Register),
    /// `STATus:...:PTRansition`
    StatusPositive(Register),
    /// `STATus:...:NTRansition`
    StatusNegative(Register),
    /// `STATus:PRESet`
    StatusPreset,
}

/// Which protection.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Protect {
    OverVoltage,
    OverCurrent,
    OverPower,
    UnderVoltage,
}

/// The two SCPI status registers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Register {
    Operation,
    Questionable,
}

/// QUEStionable bits of SCPI-1999 used by the protections: 0 VOLTage,
/// 1 CURRent, 3 POWer, 4 TEMPerature.
pub const QUES_VOLTAGE: u16 = 1 << 0;
pub const QUES_CURRENT: u16 = 1 << 1;
pub const QUES_POWER: u16 = 1 << 3;
pub const QUES_TEMPERATURE: u16 = 1 << 4;
/// OPERation bits 8-10, left to the instrument by SCPI-1999: here
/// regulating at constant voltage, at constant current, output on.
pub const OPER_CV: u16 = 1 << 8;
pub const OPER_CC: u16 = 1 << 9;
pub const OPER_OUTPUT_ON: u16 = 1 << 10;

/// The command tree in SCPI notation. Measurement queries are reachable
/// under MEASure, READ and FETCh alike (continuously measuring instruments
/// treat them the same).
pub const TREE: &[(&str, Cmd)] = &[
    ("*IDN", Cmd::Idn),
    ("*RST", Cmd::Rst),
    ("*CLS", Cmd::Cls),
    ("*OPC", Cmd::Opc),
    ("*WAI", Cmd::Wai),
    ("*ESR", Cmd::Esr),
    ("*ESE", Cmd::Ese),
    ("*STB", Cmd::Stb),
    ("*SRE", Cmd::Sre),
    ("*TST", Cmd::Tst),
    ("SYSTem:ERRor[:NEXT]", Cmd::SystemError),
    ("SYSTem:ERRor:COUNt", Cmd::SystemErrorCount),
    ("SYSTem:VERSion", Cmd::SystemVersion),
    (
        "[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]",
        Cmd::Voltage,
    ),
    (
        "[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]",
        Cmd::Current,
    ),
    ("[SOURce:]POWer[:LEVel][:IMMediate][:AMPLitude]", Cmd::Power),
    (
        "[SOURce:]RESistance[:LEVel][:IMMediate][:AMPLitude]",
        Cmd::Resistance,
    ),
    ("[SOURce:]FUNCtion[:MODE]", Cmd::Function),
    ("OUTPut[:STATe]", Cmd::Output),
    ("INPut[:STATe]", Cmd::Input),
    ("MEASure[:SCALar]:VOLTage[:DC]", Cmd::MeasureVoltage),
    ("MEASure[:SCALar]:CURRent[:DC]", Cmd::MeasureCurrent),
    ("MEASure[:SCALar]:POWer[:DC]", Cmd::MeasurePower),
    ("MEASure[:SCALar]:TEMPerature", Cmd::MeasureTemperature),
    ("READ[:SCALar]:VOLTage[:DC]", Cmd::MeasureVoltage),
    ("READ[:SCALar]:CURRent[:DC]", Cmd::MeasureCurrent),
    ("READ[:SCALar]:POWer[:DC]", Cmd::MeasurePower),
    ("READ[:SCALar]:TEMPerature", Cmd::MeasureTemperature),
    ("FETCh[:SCALar]:VOLTage[:DC]", Cmd::MeasureVoltage),
    ("FETCh[:SCALar]:CURRent[:DC]", Cmd::MeasureCurrent),
    ("FETCh[:SCALar]:POWer[:DC]", Cmd::MeasurePower),
    ("FETCh[:SCALar]:TEMPerature", Cmd::MeasureTemperature),
    ("ROUTe:SCAN", Cmd::RouteScan),
    ("CONFigure[:SCALar]:VOLTage[:DC]", Cmd::Configure),
    ("CONFigure[:SCALar]:TEMPerature", Cmd::Configure),
    ("INITiate[:IMMediate]", Cmd::Initiate),
    ("READ", Cmd::ReadScan),
    ("FETCh", Cmd::FetchScan),
    (
        "[SOURce:]VOLTage:PROTection:UNDer[:LEVel]",
        Cmd::ProtectionLevel(Protect::UnderVoltage),
    ),
    (
        "[SOURce:]VOLTage:PROTection:UNDer:STATe",
        Cmd::ProtectionState(Protect::UnderVoltage),
    ),
    (
        "[SOURce:]VOLTage:PROTection:UNDer:TRIPped",
        Cmd::ProtectionTripped(Protect::UnderVoltage),
    ),
    (
        "[SOURce:]VOLTage:PROTection[:LEVel]",
        Cmd::ProtectionLevel(Protect::OverVoltage),
    ),
    (
        "[SOURce:]VOLTage:PROTection:STATe",
        Cmd::ProtectionState(Protect::OverVoltage),
    ),
    (
        "[SOURce:]VOLTage:PROTection:TRIPped",
        Cmd::ProtectionTripped(Protect::OverVoltage),
    ),
    ("[SOURce:]VOLTage:PROTection:CLEar", Cmd::ProtectionClear),
    (
        "[SOURce:]CURRent:PROTection[:LEVel]",
        Cmd::ProtectionLevel(Protect::OverCurrent),
    ),
    (
        "[SOURce:]CURRent:PROTection:STATe",
        Cmd::ProtectionState(Protect::OverCurrent),
    ),
    (
        "[SOURce:]CURRent:PROTection:TRIPped",
        Cmd::ProtectionTripped(Protect::OverCurrent),
    ),
    ("[SOURce:]CURRent:PROTection:CLEar", Cmd::ProtectionClear),
    (
        "[SOURce:]POWer:PROTection[:LEVel]",
        Cmd::ProtectionLevel(Protect::OverPower),
    ),
    (
        "[SOURce:]POWer:PROTection:STATe",
        Cmd::ProtectionState(Protect::OverPower),
    ),
    (
        "[SOURce:]POWer:PROTection:TRIPped",
        Cmd::ProtectionTripped(Protect::OverPower),
    ),
    ("[SOURce:]POWer:PROTection:CLEar", Cmd::ProtectionClear),
    ("[SOURce:]VOLTage:ON[:LEVel]", Cmd::VoltageOn),
    ("OUTPut:PROTection:CLEar", Cmd::ProtectionClear),
    ("INPut:PROTection:CLEar", Cmd::ProtectionClear),
    (
        "STATus:OPERation:CONDition",
        Cmd::StatusCondition(Register::Operation),
    ),
    (
        "STATus:OPERation[:EVENt]",
        Cmd::StatusEvent(Register::Operation),
    ),
    (
        "STATus:OPERation:ENABle",
        Cmd::StatusEnable(Register::Operation),
    ),
    (
        "STATus:OPERation:PTRansition",
        Cmd::StatusPositive(Register::Operation),
    ),
    (
        "STATus:OPERation:NTRansition",
        Cmd::StatusNegative(Register::Operation),
    ),
    (
        "STATus:QUEStionable:CONDition",
        Cmd::StatusCondition(Register::Questionable),
    ),
    (
        "STATus:QUEStionable[:EVENt]",
        Cmd::StatusEvent(Register::Questionable),
    ),
    (
        "STATus:QUEStionable:ENABle",
        Cmd::StatusEnable(Register::Questionable),
    ),
    (
        "STATus:QUEStionable:PTRansition",
        Cmd::StatusPositive(Register::Questionable),
    ),
    (
        "STATus:QUEStionable:NTRansition",
        Cmd::StatusNegative(Register::Questionable),
    ),
    ("STATus:PRESet", Cmd::StatusPreset),
];

/// Load-mode words for `FUNCtion`, in long and short form.
pub const FUNCTION_WORDS: &[(&str, &str)] = &[
    ("CURRent", "CURR"),
    ("VOLTage", "VOLT"),
    ("POWer", "POW"),
    ("RESistance", "RES"),
];

#[derive(Debug, Clone)]
struct Node {
    short: String,
    long: String,
    optional: bool,
}

fn parse_pattern(p: &str) -> Vec<Node> {
    // Split "[SOURce:]VOLTage[:LEVel]" into nodes; brackets mark optional.
    let mut nodes = Vec::new();
    let mut rest = p;
    while !rest.is_empty() {
        let optional = rest.starts_with('[');
        let (chunk, next) = if optional {
            let end = rest.find(']').unwrap_or(rest.len());
            (&rest[1..end], rest.get(end + 1..).unwrap_or(""))
        } else {
            let end = rest[1..]
                .find(['[', ':'])
                .map(|e| e + 1)
                .unwrap_or(rest.len());
            (&rest[..end], &rest[end..])
        };
        let word = chunk.trim_matches(':');
        if !word.is_empty() {
            nodes.push(Node {
                short: word.chars().filter(|c| !c.is_ascii_lowercase()).collect(),
                long: word.to_ascii_uppercase(),
                optional,
            });
        }
        rest = next;
    }
    nodes
}

fn compiled() -> &'static Vec<(Vec<Node>, Cmd)> {
    static TREE_NODES: OnceLock<Vec<(Vec<Node>, Cmd)>> = OnceLock::new();
    TREE_NODES.get_or_init(|| TREE.iter().map(|(p, c)| (parse_pattern(p), *c)).collect())
}

/// Does keyword `k` (already upper-cased, suffix stripped) name `n`?
fn kw_matches(k: &str, n: &Node) -> bool {
    k == n.short || k == n.long
}

/// Strip a numeric suffix (`OUTP1`); only instance 1 exists on our
/// single-channel instruments.
fn strip_suffix(k: &str) -> Result<String, ScpiError> {
    let up = k.to_ascii_uppercase();
    let digits = up.len() - up.trim_end_matches(|c: char| c.is_ascii_digit()).len();
    if digits == 0 || up.starts_with('*') {
        return Ok(up);
    }
    let (word, num) = up.split_at(up.len() - digits);
    if num == "1" {
        Ok(word.to_string())
    } else {
        Err(ScpiError::HeaderSuffix)
    }
}

fn match_nodes(keys: &[String], nodes: &[Node]) -> bool {
    match (keys.first(), nodes.first()) {
        (_, None) => keys.is_empty(),
        (k, Some(n)) => {
            (n.optional && match_nodes(keys, &nodes[1..]))
                || k.is_some_and(|k| kw_matches(k, n) && match_nodes(&keys[1..], &nodes[1..]))
        }
    }
}

/// SCPI errors the parser raises, with their standard numbers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ScpiError {
    InvalidCharacter,
    Syntax,
    DataType,
    ParameterNotAllowed,
    MissingParameter,
    UndefinedHeader,
    HeaderSuffix,
    InvalidSuffix,
    IllegalParameterValue,
    DataOutOfRange,
    SettingsConflict,
    ExecutionError,
    QueueOverflow,
}

impl ScpiError {
    pub fn code(&self) -> i32 {
        match self {
            ScpiError::InvalidCharacter => -101,
            ScpiError::Syntax => -102,
            ScpiError::DataType => -104,
            ScpiError::ParameterNotAllowed => -108,
            ScpiError::MissingParameter => -109,
            ScpiError::UndefinedHeader => -113,
            ScpiError::HeaderSuffix => -114,
            ScpiError::InvalidSuffix => -131,
            ScpiError::IllegalParameterValue => -224,
            ScpiError::DataOutOfRange => -222,
            ScpiError::SettingsConflict => -221,
            ScpiError::ExecutionError => -200,
            ScpiError::QueueOverflow => -350,
        }
    }
    pub fn text(&self) -> &'static str {
        match self {
            ScpiError::InvalidCharacter => "Invalid character",
            ScpiError::Syntax => "Syntax error",
            ScpiError::DataType => "Data type error",
            ScpiError::ParameterNotAllowed => "Parameter not allowed",
            ScpiError::MissingParameter => "Missing parameter",
            ScpiError::UndefinedHeader => "Undefined header",
            ScpiError::HeaderSuffix => "Header suffix out of range",
            ScpiError::InvalidSuffix => "Invalid suffix",
            ScpiError::IllegalParameterValue => "Illegal parameter value",
            ScpiError::DataOutOfRange => "Data out of range",
            ScpiError::SettingsConflict => "Settings conflict",
            ScpiError::ExecutionError => "Execution error",
            ScpiError::QueueOverflow => "Queue overflow",
        }
    }
    /// Command errors (-1xx) end the parsing of the rest of the message.
    pub fn is_command_error(&self) -> bool {
        (-199..=-100).contains(&self.code())
    }
}

/// One program message unit, resolved against the command tree.
#[derive(Debug, Clone, PartialEq)]
pub struct Unit {
    pub cmd: Cmd,
    pub query: bool,
    pub params: Vec<String>,
}

/// Split a message on `;` and `,` outside quotes.
fn split_outside_quotes(s: &str, sep: char) -> Vec<&str> {
    let mut out = Vec::new();
    let mut quote: Option<char> = None;
    // Parentheses hold expression data, e.g. a channel list `(@101:104,110)`.
    let mut depth = 0u32;
    let mut start = 0;
    for (i, c) in s.char_indices() {
        match quote {
            Some(q) if c == q => quote = None,
            Some(_) => {}
            None if c == '"' || c == '\'' => quote = Some(c),
            None if c == '(' => depth += 1,
            None if c == ')' => depth = depth.saturating_sub(1),
            None if c == sep && depth == 0 => {
                out.push(&s[start..i]);
                start = i + c.len_utf8();
            }
            None => {}
        }
    }
    out.push(&s[start..]);
    out
}

/// Parse one program message (one line) into units, applying the header
/// path rule. Each unit is parsed independently: the caller executes units
/// in order and stops at the first command error, as IEEE 488.2 allows.
pub fn parse_message(line: &str) -> Vec<Result<Unit, ScpiError>> {
    let mut out = Vec::new();
    let mut path: Vec<String> = Vec::new();
    let line = line.trim_end_matches(['\r', '\n']);
    for raw in split_outside_quotes(line, ';') {
        let unit = raw.trim();
        if unit.is_empty() {
            // An empty unit between separators is a syntax error; a fully
            // empty message is simply nothing.
            if line.trim().is_empty() {
                continue;
            }
            out.push(Err(ScpiError::Syntax));
            continue;
        }
        let (header, params) = match unit.find(char::is_whitespace) {
            Some(i) => (&unit[..i], unit[i..].trim()),
            None => (unit, ""),
        };
        let query = header.ends_with('?');
        let header = header.trim_end_matches('?');
        let params: Vec<String> = if params.is_empty() {
            Vec::new()
        } else {
            split_outside_quotes(params, ',')
                .into_iter()
                .map(|p| p.trim().to_string())
                .collect()
        };
        if header.starts_with('*') {
            let name = header.to_ascii_uppercase();
            if !name[1..].chars().all(|c| c.is_ascii_alphabetic()) || name.len() < 2 {
                out.push(Err(ScpiError::InvalidCharacter));
                continue;
            }
            let found = compiled()
                .iter()
                .find(|(nodes, _)| nodes.len() == 1 && nodes[0].long == name);
            out.push(match found {
                Some((_, cmd)) => Ok(Unit {
                    cmd: *cmd,
                    query,
                    params,
                }),
                None => Err(ScpiError::UndefinedHeader),
            });
            continue;
        }
        let absolute = header.starts_with(':');
        let header = header.trim_start_matches(':');
        if header.is_empty() {
            out.push(Err(ScpiError::Syntax));
            continue;
        }
        if header
            .chars()
            .any(|c| !(c.is_ascii_alphanumeric() || c == ':' || c == '_'))
        {
            out.push(Err(ScpiError::InvalidCharacter));
            continue;
        }
        let parts: Vec<&str> = header.split(':').collect();
        if parts.iter().any(|p| p.is_empty()) {
            out.push(Err(ScpiError::Syntax));
            continue;
        }
        let mut keys: Vec<String> = if absolute { Vec::new() } else { path.clone() };
        let mut suffix_error = false;
        for p in &parts {
            match strip_suffix(p) {
                Ok(k) => keys.push(k),
                Err(_) => suffix_error = true,
            }
        }
        // The next unit's path is this header up to its last ':'.
        path = keys[..keys.len().saturating_sub(1)].to_vec();
        if suffix_error {
            out.push(Err(ScpiError::HeaderSuffix));
            continue;
        }
        let found = compiled()
            .iter()
            .find(|(nodes, _)| !nodes[0].long.starts_with('*') && match_nodes(&keys, nodes));
        out.push(match found {
            Some((_, cmd)) => Ok(Unit {
                cmd: *cmd,
                query,
                params,
            }),
            None => Err(ScpiError::UndefinedHeader),
        });
    }
    out
}

/// Parse an `<NRf>` parameter with an optional unit suffix (`2500mV`,
/// `100 MA`). `unit` is the base unit's letters (`V`, `A`, `W`, `OHM`).
/// Returns `Ok(None)` for MIN/MAX/DEF, which the caller resolves.
pub fn parse_nrf(param: &str, unit: &str) -> Result<NumericParam, ScpiError> {
    let p = param.trim();
    let up = p.to_ascii_uppercase();
    match up.as_str() {
        "MIN" | "MINIMUM" => return Ok(NumericParam::Min),
        "MAX" | "MAXIMUM" => return Ok(NumericParam::Max),
        "DEF" | "DEFAULT" => return Ok(NumericParam::Default),
        _ => {}
    }
    let end = up
        .find(|c: char| !(c.is_ascii_digit() || matches!(c, '+' | '-' | '.' | 'E')))
        .unwrap_or(up.len());
    // An 'E' that is not followed by a digit or sign belongs to the suffix.
    let mut num_end = end;
    if let Some(epos) = up[..end].find('E') {
        let after = up[epos + 1..end].trim_start_matches(['+', '-']);
        if after.is_empty() {
            num_end = epos;
        }
    }
    let num = &up[..num_end];
    let suffix = up[num_end..].trim();
    if num.is_empty() {
        return Err(ScpiError::DataType);
    }
    let x: f64 = num.parse().map_err(|_| ScpiError::DataType)?;
    if !x.is_finite() {
        return Err(ScpiError::DataOutOfRange);
    }
    let scale = if suffix.is_empty() || suffix == unit {
        1.0
    } else if suffix.strip_prefix('M') == Some(unit) && unit != "OHM" {
        1e-3
    } else if suffix.strip_prefix('U') == Some(unit) {
        1e-6
    } else if suffix.strip_prefix('K') == Some(unit) {
        1e3
    } else if unit == "OHM" && suffix == "MOHM" {
        // SCPI: MOHM means mega-ohm.
        1e6
    } else {
        return Err(ScpiError::InvalidSuffix);
    };
    Ok(NumericParam::Value(x * scale))
}

/// A numeric parameter as sent.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum NumericParam {
    Value(f64),
    Min,
    Max,
    Default,
}

/// Parse a `<Boolean>` parameter.
pub fn parse_bool(param: &str) -> Result<bool, ScpiError> {
    match param.trim().to_ascii_uppercase().as_str() {
        "ON" => Ok(true),
        "OFF" => Ok(false),
        // Character data that is not one of the allowed words.
        other if other.starts_with(|c: char| c.is_ascii_alphabetic()) => {
            Err(ScpiError::IllegalParameterValue)
        }
        other => other
            .parse::<f64>()
            .map(|x| x.round() != 0.0)
            .map_err(|_| ScpiError::DataType),
    }
}

/// Format a number as NR3 response data, e.g. `+4.19872E+00`.
pub fn nr3(x: f64) -> String {
    if x == 0.0 {
        return "+0.00000E+00".into();
    }
    let exp = x.abs().log10().floor() as i32;
    let mut mant = x / 10f64.powi(exp);
    let mut exp = exp;
    // Rounding can carry the mantissa to 10.
    if (mant.abs() * 1e5).round() / 1e5 >= 10.0 {
        mant /= 10.0;
        exp += 1;
    }
    format!(
        "{:+.5}E{}{:02}",
        mant,
        if exp < 0 { '-' } else { '+' },
        exp.abs()
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn one(s: &str) -> Result<Unit, ScpiError> {
        parse_message(s).remove(0)
    }

    #[test]
    fn long_short_and_optional_forms_are_one_command() {
        // SCPI-1999: optional nodes may be sent or left out; case does not matter.
        for s in [
            "SOURce:VOLTage:LEVel:IMMediate:AMPLitude 12.5",
            "SOUR:VOLT:LEV:IMM:AMPL 12.5",
            "VOLTage 12.5",
            "VOLT 12.5",
            "volt 12.5",
            "VoLtAgE 12.5",
        ] {
            let u = one(s).unwrap_or_else(|e| panic!("{s}: {e:?}"));
            assert_eq!(u.cmd, Cmd::Voltage, "{s}");
            assert!(!u.query);
            assert_eq!(u.params, vec!["12.5".to_string()]);
        }
        assert_eq!(one("OUTP:STAT?").unwrap().cmd, Cmd::Output);
        assert_eq!(one("OUTP1?").unwrap().cmd, Cmd::Output);
        assert_eq!(one("MEAS:SCAL:VOLT:DC?").unwrap().cmd, Cmd::MeasureVoltage);
        assert_eq!(one("*idn?").unwrap().cmd, Cmd::Idn);
    }

    #[test]
    fn bad_abbreviations_are_undefined_headers() {
        // SCPI: only the exact short or long form is accepted.
        for s in ["VOLTA 1", "VOLTAG 1", "MEASU:VOLT?", "FOO?", "*FOO"] {
            assert_eq!(one(s), Err(ScpiError::UndefinedHeader), "{s}");
        }
        assert_eq!(one("OUTP3 ON"), Err(ScpiError::HeaderSuffix));
        assert_eq!(one("VOLT& 1"), Err(ScpiError::InvalidCharacter));
        assert_eq!(one("VOLT::LEV 1"), Err(ScpiError::Syntax));
    }

    #[test]
    fn header_path_rule_for_compound_messages() {
        // Examples from the SCPI fact sheet (IEEE 488.2 header path).
        let cmds = |s: &str| -> Vec<Result<Cmd, ScpiError>> {
            parse_message(s)
                .into_iter()
                .map(|u| u.map(|u| u.cmd))
                .collect()
        };
        assert_eq!(
            cmds("VOLT 12;CURR 1"),
            vec![Ok(Cmd::Voltage), Ok(Cmd::Current)]
        );
        assert_eq!(
            cmds("SOUR:VOLT 12;CURR 1"),
            vec![Ok(Cmd::Voltage), Ok(Cmd::Current)]
        );
        assert_eq!(
            cmds("MEAS:VOLT?;CURR?"),
            vec![Ok(Cmd::MeasureVoltage), Ok(Cmd::MeasureCurrent)]
        );
        assert_eq!(
            cmds("MEAS:VOLT?;MEAS:CURR?"),
            vec![Ok(Cmd::MeasureVoltage), Err(ScpiError::UndefinedHeader)]
        );
        assert_eq!(
            cmds("MEAS:VOLT?;:SYST:ERR?"),
            vec![Ok(Cmd::MeasureVoltage), Ok(Cmd::SystemError)]
        );
        assert_eq!(
            cmds("VOLT 5;*OPC?;CURR 1"),
            vec![Ok(Cmd::Voltage), Ok(Cmd::Opc), Ok(Cmd::Current)]
        );
    }

    #[test]
    fn numeric_parameters() {
        assert_eq!(parse_nrf("12.5", "V"), Ok(NumericParam::Value(12.5)));
        assert_eq!(parse_nrf("1.25E1", "V"), Ok(NumericParam::Value(12.5)));
        assert_eq!(parse_nrf(".5", "A"), Ok(NumericParam::Value(0.5)));
        assert_eq!(parse_nrf("2500mV", "V"), Ok(NumericParam::Value(2.5)));
        assert_eq!(parse_nrf("100 MA", "A"), Ok(NumericParam::Value(0.1)));
        assert_eq!(parse_nrf("max", "V"), Ok(NumericParam::Max));
        assert_eq!(parse_nrf("5 A", "V"), Err(ScpiError::InvalidSuffix));
        assert_eq!(parse_nrf("abc", "V"), Err(ScpiError::DataType));
        assert_eq!(parse_nrf("1.2.3", "V"), Err(ScpiError::DataType));
    }

    #[test]
    fn nr3_format() {
        assert_eq!(nr3(12.4981), "+1.24981E+01");
        assert_eq!(nr3(-0.25), "-2.50000E-01");
        assert_eq!(nr3(0.0), "+0.00000E+00");
        assert_eq!(nr3(9.999999), "+1.00000E+01");
        assert_eq!(nr3(4.19872).parse::<f64>().unwrap(), 4.19872);
    }
}
