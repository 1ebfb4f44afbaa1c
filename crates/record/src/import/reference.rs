//! The importer against a reference written here from the format's rules
//! alone (issue 33's mutation score): random logs in every layout the
//! importer accepts — delimiter, line ends, time unit in the header, current
//! sign, an optional temperature column with empty cells, step and cycle
//! columns, a column it skips, quoted cells, signs and exponents, spaces —
//! are written from values the test knows, and every row must come back
//! as those values: numbers as Rust's own `str::parse::<f64>` reads their
//! text (correctly rounded), times scaled by the unit, currents by the
//! sign. A bad cell planted at a random row and column must be named at
//! its own line and column, or counted and listed with `skip_bad_rows`.

use super::*;
use proptest::prelude::*;

#[derive(Debug, Clone)]
struct Layout {
    delim: u8,
    crlf: bool,
    /// Header name of the time column and its factor to seconds.
    time: (&'static str, f64),
    discharge_positive: bool,
    temperature: bool,
    step: bool,
    /// A column the importer does not use, before the voltage.
    skipped: bool,
    ours: bool,
}

fn layout() -> impl Strategy<Value = Layout> {
    (
        prop_oneof![Just(b','), Just(b';'), Just(b'\t')],
        any::<bool>(),
        prop_oneof![
            Just(("t_s", 1.0)),
            Just(("time_ms", 0.001)),
            Just(("Time [min]", 60.0)),
            Just(("time/h", 3600.0)),
        ],
        any::<bool>(),
        any::<bool>(),
        any::<bool>(),
        any::<bool>(),
        prop::bool::weighted(0.2),
    )
        .prop_map(
            |(delim, crlf, time, discharge_positive, temperature, step, skipped, ours)| {
                if ours {
                    // packbench's own samples.csv: its header, commas, LF.
                    Layout {
                        delim: b',',
                        crlf: false,
                        time: ("t_s", 1.0),
                        discharge_positive: false,
                        temperature: true,
                        step: true,
                        skipped: false,
                        ours: true,
                    }
                } else {
                    Layout {
                        delim,
                        crlf,
                        time,
                        discharge_positive,
                        temperature,
                        step,
                        skipped,
                        ours: false,
                    }
                }
            },
        )
}

/// One row's values as the test chose them.
#[derive(Debug, Clone)]
struct Values {
    t: f64,
    v: f64,
    i: f64,
    temp: Option<f64>,
    step: u32,
    /// How the cells are written: 0 plain, 1 with spaces, 2 quoted,
    /// 3 exponent form, 4 leading plus.
    style: u8,
}

fn values() -> impl Strategy<Value = Values> {
    (
        0.0f64..1.0e5,
        0.0f64..60.0,
        -200.0f64..200.0,
        prop::option::of(-20.0f64..80.0),
        1u32..40,
        0u8..5,
    )
        .prop_map(|(t, v, i, temp, step, style)| Values {
            t,
            v,
            i,
            temp,
            step,
            style,
        })
}

/// A number's text in a row's style.
fn cell(x: f64, decimals: usize, style: u8, delim: u8) -> String {
    match style {
        1 => format!(" {x:.decimals$} "),
        // Quoting is only for comma-separated logs.
        2 if delim == b',' => format!("\"{x:.decimals$}\""),
        3 => format!("{x:.4e}"),
        4 if x >= 0.0 => format!("+{x:.decimals$}"),
        _ => format!("{x:.decimals$}"),
    }
}

/// The log's text, and each row's expected values, in pack convention.
fn write_log(l: &Layout, rows: &[Values]) -> (String, Vec<Row>) {
    let d = char::from(l.delim).to_string();
    let nl = if l.crlf { "\r\n" } else { "\n" };
    let mut head: Vec<&str> = vec![l.time.0];
    if l.ours {
        head = super::super::CSV_COLUMNS.to_vec();
    } else {
        if l.step {
            head.push("Step");
        }
        if l.skipped {
            head.push("note");
        }
        head.extend(["voltage_v", "current_a"]);
        if l.temperature {
            head.push("temperature_c");
        }
    }
    let mut text = head.join(&d) + nl;
    let mut want = Vec::new();
    for r in rows {
        let parse = |s: &str| s.trim().trim_matches('"').parse::<f64>().unwrap();
        let t_text = cell(r.t, 3, r.style, l.delim);
        let v_text = cell(r.v, 4, r.style, l.delim);
        let i_text = cell(r.i, 4, r.style, l.delim);
        let temp_text = r.temp.map(|x| cell(x, 2, r.style, l.delim));
        let mut f: Vec<String> = vec![t_text.clone()];
        if l.ours {
            f.extend([
                r.step.to_string(),
                "1".into(),
                v_text.clone(),
                i_text.clone(),
            ]);
            f.push(temp_text.clone().unwrap_or_default());
        } else {
            if l.step {
                f.push(r.step.to_string());
            }
            if l.skipped {
                f.push("bay 3".into());
            }
            f.extend([v_text.clone(), i_text.clone()]);
            if l.temperature {
                f.push(temp_text.clone().unwrap_or_default());
            }
        }
        text.push_str(&f.join(&d));
        text.push_str(nl);
        let sign = if l.discharge_positive { -1.0 } else { 1.0 };
        want.push(Row {
            t_s: parse(&t_text) * l.time.1,
            voltage_v: parse(&v_text),
            current_a: sign * parse(&i_text) + 0.0,
            temperature_c: if l.ours || l.temperature {
                temp_text.as_deref().map(parse)
            } else {
                None
            },
            step: (l.ours || l.step).then_some(r.step),
            cycle: l.ours.then_some(1),
        });
    }
    (text, want)
}

fn format_of(l: &Layout, skip_bad_rows: bool) -> LogFormat {
    LogFormat {
        columns: ColumnNames {
            step: (l.step && !l.ours).then(|| "Step".to_string()),
            ..ColumnNames::default()
        },
        sign: if l.discharge_positive {
            CurrentSign::DischargePositive
        } else {
            CurrentSign::ChargePositive
        },
        skip_bad_rows,
        ..LogFormat::default()
    }
}

fn read(text: &str, fmt: &LogFormat) -> Result<(Vec<Row>, ReadReport), ReadError> {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("log.csv");
    std::fs::write(&p, text).unwrap();
    let mut got = Vec::new();
    let rep = stream_log(&p, fmt, |r| got.push(r))?;
    Ok((got, rep))
}

fn same(a: f64, b: f64) -> bool {
    a == b || (a - b).abs() <= 1e-12 * a.abs().max(b.abs())
}

fn rows_match(got: &[Row], want: &[Row]) -> Result<(), String> {
    if got.len() != want.len() {
        return Err(format!("{} rows, {} written", got.len(), want.len()));
    }
    for (k, (g, w)) in got.iter().zip(want).enumerate() {
        let ok = same(g.t_s, w.t_s)
            && same(g.voltage_v, w.voltage_v)
            && same(g.current_a, w.current_a)
            && match (g.temperature_c, w.temperature_c) {
                (Some(a), Some(b)) => same(a, b),
                (a, b) => a == b,
            }
            && g.step == w.step
            && g.cycle == w.cycle;
        if !ok {
            return Err(format!("row {k}: {g:?}, written {w:?}"));
        }
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 160, ..ProptestConfig::default() })]

    /// Every row comes back as written, in every layout.
    #[test]
    fn every_row_comes_back_as_written(l in layout(), rows in prop::collection::vec(values(), 1..40)) {
        let (text, want) = write_log(&l, &rows);
        let (got, rep) = read(&text, &format_of(&l, false)).unwrap();
        if let Err(e) = rows_match(&got, &want) {
            prop_assert!(false, "{e}\n{text}");
        }
        prop_assert_eq!(rep.rows, want.len() as u64);
        prop_assert_eq!(rep.ours, l.ours);
        prop_assert!(!rep.partial_last_line);
        prop_assert_eq!(rep.bad_rows_skipped, 0);
        // The columns it used, by their header names.
        let used: Vec<&str> = rep.columns_used.iter().map(|(role, _)| role.as_str()).collect();
        prop_assert_eq!(&used[..3], &["time", "voltage", "current"][..]);
        prop_assert_eq!(&rep.columns_used[0].1, l.time.0);
        prop_assert_eq!(used.contains(&"step"), l.step || l.ours);
    }

    /// A bad cell is named at its own line (the header is line 1) and
    /// column; with `skip_bad_rows` its row alone is left out, counted and
    /// listed at that line.
    #[test]
    fn a_bad_cell_is_named_at_its_line_and_column(
        l in layout(),
        rows in prop::collection::vec(values(), 2..30),
        at in any::<prop::sample::Index>(),
        which in 0usize..3,
        junk in prop_oneof![Just("n/a"), Just("3..5"), Just("1e999"), Just("12V")],
    ) {
        let (text, want) = write_log(&l, &rows);
        let bad_row = at.index(rows.len());
        let d = char::from(l.delim);
        let nl = if l.crlf { "\r\n" } else { "\n" };
        // The time, voltage or current cell of that row (quoted cells are
        // not planted in: the junk replaces a whole field).
        let header: Vec<&str> = text.lines().next().unwrap().trim_end_matches('\r').split(d).collect();
        let role = ["time", "voltage", "current"][which];
        let column = match role {
            "time" => 0,
            "voltage" => header.iter().position(|h| *h == "voltage_v").unwrap(),
            _ => header.iter().position(|h| *h == "current_a").unwrap(),
        };
        let mut lines: Vec<String> = text.split(nl).map(str::to_string).collect();
        let mut fields: Vec<String> = lines[bad_row + 1].split(d).map(str::to_string).collect();
        prop_assume!(!fields.iter().any(|f| f.contains('"')));
        fields[column] = junk.to_string();
        lines[bad_row + 1] = fields.join(&d.to_string());
        let text = lines.join(nl);
        // The rows before the bad one are handed over before the error
        // (nothing read is lost).
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("log.csv");
        std::fs::write(&path, &text).unwrap();
        let mut before = 0usize;
        let err = stream_log(&path, &format_of(&l, false), |_| before += 1);
        prop_assert!(err.is_err());
        prop_assert_eq!(before, bad_row);
        match read(&text, &format_of(&l, false)) {
            Err(ReadError::Bad { line, column: c, message, .. }) => {
                prop_assert_eq!(line, bad_row + 2, "{}", message);
                prop_assert_eq!(c, column + 1, "{}", message);
                prop_assert!(message.contains(junk), "{}", message);
            }
            other => prop_assert!(false, "{:?}", other.map(|(r, _)| r.len())),
        }
        let (got, rep) = read(&text, &format_of(&l, true)).unwrap();
        let mut kept = want.clone();
        kept.remove(bad_row);
        if let Err(e) = rows_match(&got, &kept) {
            prop_assert!(false, "{e}");
        }
        prop_assert_eq!(rep.bad_rows_skipped, 1);
        prop_assert_eq!(rep.rows, kept.len() as u64);
        prop_assert_eq!(rep.bad_rows[0].0, bad_row as u64 + 2);
    }
}

/// A row with too many or too few fields is named with the column where
/// the count goes wrong, and a decimal comma is suggested for a comma log.
#[test]
fn a_row_with_the_wrong_count_of_fields_is_named() {
    let text = "t_s,voltage_v,current_a\n0,3.7,-1\n1,3,6,-1\n2,3.5\n";
    match read(text, &LogFormat::default()) {
        Err(ReadError::Bad {
            line,
            column,
            message,
            ..
        }) => {
            // The column is the character where the extra field starts.
            assert_eq!((line, column), (3, 7), "{message}");
            assert!(message.contains("expected 3 fields"), "{message}");
            assert!(message.contains("found 4"), "{message}");
            assert!(message.contains("decimal comma"), "{message}");
        }
        other => panic!("{other:?}"),
    }
    let (rows, rep) = read(
        text,
        &LogFormat {
            skip_bad_rows: true,
            ..LogFormat::default()
        },
    )
    .unwrap();
    assert_eq!(rows.len(), 1);
    assert_eq!(rep.bad_rows_skipped, 2);
    assert_eq!(rep.bad_rows.iter().map(|b| b.0).collect::<Vec<_>>(), [3, 4]);
    // Too few: the column after the last one found.
    assert!(rep.bad_rows[1].1.contains("found 2"), "{:?}", rep.bad_rows);
    // A semicolon log with decimal commas reads them as decimal points.
    let (rows, _) = read(
        "t_s;voltage_v;current_a\n0;3,7;-1,5\n",
        &LogFormat::default(),
    )
    .unwrap();
    assert_eq!((rows[0].voltage_v, rows[0].current_a), (3.7, -1.5));
}

/// More than twenty bad rows: all counted, the first twenty listed.
#[test]
fn bad_rows_past_twenty_are_counted_not_listed() {
    let mut text = String::from("t_s,voltage_v,current_a\n");
    for k in 0..50 {
        if k % 2 == 0 {
            text.push_str(&format!("{k},x,-1\n"));
        } else {
            text.push_str(&format!("{k},3.6,-1\n"));
        }
    }
    let (rows, rep) = read(
        &text,
        &LogFormat {
            skip_bad_rows: true,
            ..LogFormat::default()
        },
    )
    .unwrap();
    assert_eq!(rows.len(), 25);
    assert_eq!(rep.rows, 25);
    assert_eq!(rep.bad_rows_skipped, 25);
    assert_eq!(rep.bad_rows.len(), 20);
    assert_eq!(rep.bad_rows[19].0, 40);
}

/// Dates and times in the time column read as seconds (UTC), and a time
/// unit given that disagrees with the header's is refused by name.
#[test]
fn dates_read_as_seconds_and_a_clashing_time_unit_is_refused() {
    let (rows, _) = read(
        "timestamp,voltage_v,current_a\n2024-05-01 10:00:00,3.7,-1\n2024-05-01T10:00:01.5,3.7,-1\n2024/05/01 10:00:03,3.7,-1\n2024-05-01T10:00:04+00:00,3.7,-1\n",
        &LogFormat::default(),
    )
    .unwrap();
    let t0 = 1_714_557_600.0; // 2024-05-01T10:00:00Z
    let t: Vec<f64> = rows.iter().map(|r| r.t_s - t0).collect();
    assert_eq!(t, [0.0, 1.5, 3.0, 4.0]);
    match read(
        "time_ms,voltage_v,current_a\n0,3.7,-1\n",
        &LogFormat {
            time_unit: TimeUnit::Minutes,
            ..LogFormat::default()
        },
    ) {
        Err(ReadError::Bad {
            line,
            column,
            message,
            ..
        }) => {
            assert_eq!((line, column), (1, 1));
            assert!(
                message.contains("in ms") && message.contains("says min"),
                "{message}"
            );
        }
        other => panic!("{other:?}"),
    }
    // A unit given for a header without one applies.
    let (rows, _) = read(
        "time,voltage_v,current_a\n2,3.7,-1\n",
        &LogFormat {
            time_unit: TimeUnit::Hours,
            ..LogFormat::default()
        },
    )
    .unwrap();
    assert_eq!(rows[0].t_s, 7200.0);
}

/// Columns named by the user are found (exactly, then ignoring case and
/// spaces); a name that is not there, or a role that cannot be guessed, is
/// an error that lists the header.
#[test]
fn named_columns_are_found_and_missing_ones_named() {
    let text = "Zeit,U,Strom,Temp\n1,3.7,-2,25\n";
    let fmt = LogFormat {
        columns: "time=zeit,current= Strom ,temperature=Temp"
            .parse()
            .unwrap(),
        ..LogFormat::default()
    };
    let (rows, rep) = read(text, &fmt).unwrap();
    assert_eq!(
        (
            rows[0].t_s,
            rows[0].voltage_v,
            rows[0].current_a,
            rows[0].temperature_c
        ),
        (1.0, 3.7, -2.0, Some(25.0))
    );
    assert_eq!(
        rep.columns_used,
        [
            ("time".to_string(), "Zeit".to_string()),
            ("voltage".into(), "U".into()),
            ("current".into(), "Strom".into()),
            ("temperature".into(), "Temp".into()),
        ]
    );
    let err = read(
        text,
        &LogFormat {
            columns: "time=Uhr".parse().unwrap(),
            ..LogFormat::default()
        },
    )
    .unwrap_err()
    .to_string();
    assert!(err.contains("no column 'Uhr' for time"), "{err}");
    assert!(err.contains("Zeit, U, Strom, Temp"), "{err}");
    let err = read(text, &LogFormat::default()).unwrap_err().to_string();
    assert!(err.contains("which column is the time"), "{err}");
    assert!("time=a,watts=b"
        .parse::<ColumnNames>()
        .unwrap_err()
        .contains("unknown role 'watts'"));
    assert!("time"
        .parse::<ColumnNames>()
        .unwrap_err()
        .contains("ROLE=NAME"));
}

/// The names of the units, signs and delimiters the command line takes.
#[test]
fn units_signs_and_delimiters_parse_by_name() {
    for (s, f) in [("s", 1.0), ("ms", 0.001), ("min", 60.0), ("h", 3600.0)] {
        assert_eq!(s.parse::<TimeUnit>().unwrap().factor(), f);
    }
    assert!("hours".parse::<TimeUnit>().is_err());
    assert_eq!(
        "discharge-positive".parse::<CurrentSign>(),
        Ok(CurrentSign::DischargePositive)
    );
    assert_eq!(
        "charge-positive".parse::<CurrentSign>(),
        Ok(CurrentSign::ChargePositive)
    );
    assert!("positive".parse::<CurrentSign>().is_err());
    for (s, d) in [
        ("comma", b','),
        (",", b','),
        ("Semicolon", b';'),
        (";", b';'),
        ("tab", b'\t'),
        ("\\t", b'\t'),
        ("\t", b'\t'),
    ] {
        assert_eq!(parse_delimiter(s), Ok(d), "{s:?}");
    }
    assert!(parse_delimiter("pipe").is_err());
    assert_eq!(detect_delimiter(b"a;b;c"), b';');
    assert_eq!(detect_delimiter(b"a\tb\tc,d"), b'\t');
    assert_eq!(detect_delimiter(b"a,b;c"), b',');
    assert_eq!(detect_delimiter(b"abc"), b',');
}

/// An empty file, and a header alone.
#[test]
fn an_empty_log_is_refused_and_a_header_alone_has_no_rows() {
    let err = read("", &LogFormat::default()).unwrap_err();
    assert!(err.to_string().contains("empty"), "{err}");
    let (rows, rep) = read("t_s,voltage_v,current_a\n", &LogFormat::default()).unwrap();
    assert!(rows.is_empty());
    assert_eq!(rep.rows, 0);
    assert!(!rep.partial_last_line);
    // A byte-order mark before the header is not part of its first name.
    let (rows, rep) = read(
        "\u{feff}t_s,voltage_v,current_a\n5,3.7,-1\n",
        &LogFormat::default(),
    )
    .unwrap();
    assert_eq!(rows[0].t_s, 5.0);
    assert_eq!(rep.columns_used[0].1, "t_s");
}

/// Values beyond any plausible pack are errors naming the bound.
#[test]
fn implausible_values_are_refused_with_the_bound() {
    for (row, col, what) in [
        ("1,2500,-1", 2, "voltage"),
        ("1,3.7,-20000", 3, "current"),
        ("1e11,3.7,-1", 1, "time"),
    ] {
        match read(
            &format!("t_s,voltage_v,current_a\n{row}\n"),
            &LogFormat::default(),
        ) {
            Err(ReadError::Bad {
                line,
                column,
                message,
                ..
            }) => {
                assert_eq!((line, column), (2, col), "{message}");
                assert!(message.contains(what), "{message}");
                assert!(message.contains("plausible"), "{message}");
            }
            other => panic!("{row}: {other:?}"),
        }
    }
    match read(
        "t_s,voltage_v,current_a,temperature_c\n1,3.7,-1,400\n",
        &LogFormat::default(),
    ) {
        Err(ReadError::Bad {
            column, message, ..
        }) => {
            assert_eq!(column, 4);
            assert!(message.contains("temperature"), "{message}");
        }
        other => panic!("{other:?}"),
    }
}

/// Step numbers are whole and not negative.
#[test]
fn step_numbers_are_whole() {
    let fmt = LogFormat::default();
    let (rows, _) = read(
        "t_s,step,voltage_v,current_a\n0,3,3.7,-1\n1,4.0,3.7,-1\n",
        &fmt,
    )
    .unwrap();
    assert_eq!(
        rows.iter().map(|r| r.step).collect::<Vec<_>>(),
        [Some(3), Some(4)]
    );
    for bad in ["2.5", "-1", "x", "5000000000"] {
        let err = read(
            &format!("t_s,step,voltage_v,current_a\n0,{bad},3.7,-1\n"),
            &fmt,
        )
        .unwrap_err()
        .to_string();
        assert!(err.contains("not a step number"), "{bad}: {err}");
        assert!(err.contains("log.csv:2:2:"), "{bad}: {err}");
    }
}

/// Line ends at the edges of what is read at a time: a CR-only log longer
/// than a chunk; a CR LF header whose CR is the last byte of the first
/// 4096 read (the LF comes with the next read); a header with no line
/// end at all; a blank line straight after the header.
#[test]
fn line_ends_at_the_edges_of_a_read() {
    let mut cr = String::from("t_s,voltage_v,current_a\r");
    for k in 0..60_000 {
        cr.push_str(&format!("{k},3.{},-1.5\r", k % 10));
    }
    assert!(cr.len() > CHUNK, "longer than a chunk");
    let (rows, rep) = read(&cr, &LogFormat::default()).unwrap();
    assert_eq!(rows.len(), 60_000);
    assert_eq!(rows[59_999].t_s, 59_999.0);
    assert!(!rep.partial_last_line);
    // A header of 4095 bytes, then CR LF.
    let name = format!(
        "note{}",
        "x".repeat(4095 - "t_s,voltage_v,current_a,note".len())
    );
    let head = format!("t_s,voltage_v,current_a,{name}");
    assert_eq!(head.len(), 4095);
    let text = format!("{head}\r\n0,3.7,-1,a\r\n1,3.6,-1,b\r\n");
    let (rows, _) = read(&text, &LogFormat::default()).unwrap();
    assert_eq!(rows.iter().map(|r| r.t_s).collect::<Vec<_>>(), [0.0, 1.0]);
    // A header alone without its line end.
    let (rows, _) = read("t_s,voltage_v,current_a", &LogFormat::default()).unwrap();
    assert!(rows.is_empty());
    // A blank line after the header, and cells with a space after them
    // only.
    let (rows, _) = read(
        "t_s,voltage_v,current_a\n\n0,3.7 ,-1\n1 ,3.6,-1 \n",
        &LogFormat::default(),
    )
    .unwrap();
    assert_eq!(
        rows.iter()
            .map(|r| (r.t_s, r.voltage_v, r.current_a))
            .collect::<Vec<_>>(),
        [(0.0, 3.7, -1.0), (1.0, 3.6, -1.0)]
    );
    // A number of more digits than the fast path takes: read as Rust reads
    // it.
    let long = "3.1234567890123456789012345";
    let (rows, _) = read(
        &format!("t_s,voltage_v,current_a\n0,{long},-1\n"),
        &LogFormat::default(),
    )
    .unwrap();
    assert_eq!(rows[0].voltage_v, long.parse::<f64>().unwrap());
}

/// The line numbers of a CR LF log whose header's CR is the last byte of
/// the first read: a bad row is named at its own line (were the log taken
/// for a CR-only one, each LF would count as a blank line too).
#[test]
fn a_crlf_header_at_the_edge_of_a_read_keeps_the_line_numbers() {
    let name = format!(
        "note{}",
        "x".repeat(4095 - "t_s,voltage_v,current_a,note".len())
    );
    let text =
        format!("t_s,voltage_v,current_a,{name}\r\n0,3.7,-1,a\r\n1,3.6,-1,b\r\n2,x,-1,c\r\n");
    match read(&text, &LogFormat::default()) {
        Err(ReadError::Bad { line, column, .. }) => assert_eq!((line, column), (4, 2)),
        other => panic!("{other:?}"),
    }
}
