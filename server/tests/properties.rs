//! Property tests of every input reader: epoch uploads (CSV and JSON), the
//! electrodes and sequence CSV readers, the model description JSON reader and
//! the configuration loader. Any input — random bytes, or text built from the
//! formats' own pieces with awkward values mixed in — gives a value or an
//! error, never a panic; what is accepted keeps its invariants; well-formed
//! readings come back as written.

use ohmline_core::geometry::{Electrode, LineGeometry};
use ohmline_server::config::Config;
use ohmline_server::files::{read_electrodes, read_model, read_sequence};
use ohmline_server::ingest::parse::{parse_csv, parse_json};
use proptest::prelude::*;

/// One CSV cell: numbers (awkward ones too), labels, quotes, empties.
fn cell() -> impl Strategy<Value = String> {
    prop_oneof![
        3 => (-1e6..1e6f64).prop_map(|v| v.to_string()),
        2 => "E[0-9]{1,2}",
        1 => Just(String::new()),
        1 => prop::sample::select(vec!["NaN", "inf", "-inf", "1e999", "0x10", "--1", "1,5", "\"", "\"a\"\"b\"", " 7 ", "\u{feff}1", "é"]).prop_map(String::from),
        1 => ".{0,8}",
    ]
}

const READING_COLUMNS: &[&str] = &[
    "a",
    "b",
    "m",
    "n",
    "resistance_ohm",
    "current_ma",
    "voltage_mv",
    "stack_error_pct",
    "contact_a_ohm",
    "contact_b_ohm",
    "extra",
    "A",
    "",
];

/// CSV text with metadata lines, a header from the format's columns and rows of cells.
fn csv_text(columns: &'static [&'static str]) -> impl Strategy<Value = String> {
    let meta = prop::collection::vec(
        (
            prop::sample::select(vec![
                "started_at",
                "finished_at",
                "meter_id",
                "sequence_version",
                "temperatures",
                "other",
                "",
            ]),
            prop_oneof![
                Just("2026-04-01T00:00:00Z".to_string()),
                Just("0.5:11.2;1.5:10".to_string()),
                Just("x:y;;".to_string()),
                cell(),
            ],
        ),
        0..4,
    );
    let header = prop::collection::vec(prop::sample::select(columns.to_vec()), 0..9);
    let rows = prop::collection::vec(prop::collection::vec(cell(), 0..10), 0..12);
    (meta, header, rows).prop_map(|(meta, header, rows)| {
        let mut s = String::new();
        for (k, v) in meta {
            s.push_str(&format!("# {k}: {v}\n"));
        }
        s.push_str(&header.join(","));
        s.push('\n');
        for r in rows {
            s.push_str(&r.join(","));
            s.push('\n');
        }
        s
    })
}

/// A JSON value built from the upload format's keys and awkward leaves.
fn json_value() -> impl Strategy<Value = serde_json::Value> {
    use serde_json::{Value, json};
    let leaf = prop_oneof![
        Just(Value::Null),
        any::<bool>().prop_map(Value::Bool),
        (-1e9..1e9f64).prop_map(|v| json!(v)),
        any::<i64>().prop_map(|v| json!(v)),
        Just(json!("2026-04-01T00:00:00Z")),
        "E[0-9]{1,2}".prop_map(Value::String),
        ".{0,6}".prop_map(Value::String),
    ];
    leaf.prop_recursive(4, 64, 8, |inner| {
        let keys = prop::sample::select(vec![
            "started_at",
            "finished_at",
            "meter_id",
            "sequence_version",
            "temperatures",
            "readings",
            "a",
            "b",
            "m",
            "n",
            "resistance_ohm",
            "current_ma",
            "voltage_mv",
            "depth_m",
            "temperature_c",
            "stack_error_pct",
            "x",
        ]);
        prop_oneof![
            prop::collection::vec(inner.clone(), 0..6).prop_map(Value::Array),
            prop::collection::btree_map(keys, inner, 0..8).prop_map(|m| Value::Object(
                m.into_iter().map(|(k, v)| (k.to_string(), v)).collect()
            )),
        ]
    })
}

fn line(n: usize) -> LineGeometry {
    LineGeometry::new(
        (0..n).map(|i| Electrode::new(format!("E{}", i + 1), i as f64, 10.0)).collect(),
    )
    .unwrap()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(512))]

    #[test]
    fn any_bytes_are_an_epoch_or_an_error(body in prop::collection::vec(any::<u8>(), 0..512), max in 1usize..50) {
        for e in [parse_csv(&body, max), parse_json(&body, max)].into_iter().flatten() {
            prop_assert!(e.readings.len() <= max);
        }
    }

    #[test]
    fn csv_uploads_parse_or_name_their_error(text in csv_text(READING_COLUMNS), max in 1usize..20) {
        match parse_csv(text.as_bytes(), max) {
            Ok(e) => {
                prop_assert!(e.readings.len() <= max);
                for r in &e.readings {
                    for v in [r.resistance_ohm, r.current_ma, r.voltage_mv].into_iter().flatten() {
                        prop_assert!(v.is_finite(), "a non-finite value was accepted: {v}");
                    }
                }
            }
            Err(e) => prop_assert!(!e.to_string().is_empty()),
        }
    }

    #[test]
    fn json_uploads_parse_or_name_their_error(v in json_value(), max in 1usize..20) {
        let body = serde_json::to_vec(&v).unwrap();
        if let Ok(e) = parse_json(&body, max) {
            prop_assert!(e.readings.len() <= max);
            for r in &e.readings {
                for v in [r.resistance_ohm, r.current_ma, r.voltage_mv].into_iter().flatten() {
                    prop_assert!(v.is_finite());
                }
            }
        }
    }

    /// Well-formed readings come back as written, in order.
    #[test]
    fn written_readings_read_back(rs in prop::collection::vec((0usize..20, 1e-6..1e6f64), 1..40)) {
        let mut csv = String::from("# started_at: 2026-04-01T00:00:00Z\na,b,m,n,resistance_ohm\n");
        let mut readings = Vec::new();
        for (i, r) in &rs {
            csv.push_str(&format!("E{},E{},E{},E{},{r}\n", i + 1, i + 4, i + 2, i + 3));
            readings.push(serde_json::json!({
                "a": format!("E{}", i + 1), "b": format!("E{}", i + 4),
                "m": format!("E{}", i + 2), "n": format!("E{}", i + 3), "resistance_ohm": r,
            }));
        }
        let json = serde_json::json!({"started_at": "2026-04-01T00:00:00Z", "readings": readings});
        for parsed in [
            parse_csv(csv.as_bytes(), 100).unwrap(),
            parse_json(json.to_string().as_bytes(), 100).unwrap(),
        ] {
            prop_assert_eq!(parsed.readings.len(), rs.len());
            for (p, (i, r)) in parsed.readings.iter().zip(&rs) {
                prop_assert_eq!(&p.a, &format!("E{}", i + 1));
                prop_assert_eq!(p.n.clone(), Some(format!("E{}", i + 3)));
                prop_assert_eq!(p.resistance_ohm, Some(*r));
            }
        }
        // One reading over the limit is refused.
        if rs.len() > 1 {
            prop_assert!(parse_csv(csv.as_bytes(), rs.len() - 1).is_err());
        }
    }

    #[test]
    fn any_electrodes_csv_is_a_line_or_an_error(text in csv_text(&["label", "x", "z", "easting", "northing", "extra", ""])) {
        if let Ok((rows, geometry)) = read_electrodes("e.csv", &text) {
            prop_assert_eq!(rows.len(), geometry.len());
            prop_assert!(geometry.electrodes().windows(2).all(|w| w[0].x() < w[1].x()));
        }
    }

    #[test]
    fn any_sequence_csv_is_a_sequence_or_an_error(text in csv_text(&["a", "b", "m", "n", "extra", ""]), n in 4usize..24) {
        let g = line(n);
        if let Ok(seq) = read_sequence("q.csv", &text, &g) {
            for q in seq.quadrupoles() {
                prop_assert!([Some(q.a), q.b, Some(q.m), q.n].iter().flatten().all(|&i| i < n));
            }
        }
    }

    #[test]
    fn any_text_is_a_model_or_an_error(v in json_value(), raw in ".{0,64}") {
        let _ = read_model("m.json", &raw);
        let _ = read_model("m.json", &v.to_string());
        // The model format's own keys, with awkward values.
        let shaped = serde_json::json!({"background": v, "layers": [{"top": 1.0, "rho": v}], "bodies": [{"polygon": [[0.0, 0.0], [1.0, 0.0], v], "rho": 5.0}]});
        let _ = read_model("m.json", &shaped.to_string());
    }

    #[test]
    fn any_configuration_loads_or_names_its_error(
        entries in prop::collection::vec(
            (
                prop::sample::select(vec![
                    "", "[ingest]", "[limits]", "[web]", "[workers]", "[notify]", "[notify.smtp]",
                    "[processing]", "[processing.temperature]", "[drop_folders]",
                ]),
                prop::sample::select(vec![
                    "max_body_bytes", "max_readings", "request_timeout_s", "header_read_timeout_s",
                    "uploads_per_minute_per_token", "max_backlog_epochs", "session_idle_s",
                    "session_max_s", "public_url", "concurrency", "lease_s", "host", "timeout_s",
                    "from", "change_modes", "damping_depth_m", "alpha_per_c", "poll_interval_s",
                    "listen", "data_dir", "unknown",
                ]),
                prop_oneof![
                    (-1e6..1e6f64).prop_map(|v| v.to_string()),
                    any::<i64>().prop_map(|v| v.to_string()),
                    Just("nan".to_string()),
                    Just("inf".to_string()),
                    Just("\"https://x.example\"".to_string()),
                    Just("[\"ratio\"]".to_string()),
                    Just("[]".to_string()),
                    "\"[a-z ]{0,8}\"",
                    ".{0,6}",
                ],
            ),
            0..8,
        ),
        raw in ".{0,80}",
    ) {
        let _ = Config::from_toml(&raw);
        let mut text = String::new();
        for (section, key, value) in entries {
            text.push_str(&format!("{section}\n{key} = {value}\n"));
        }
        match Config::from_toml(&text) {
            Ok(c) => {
                prop_assert!(c.ingest.max_readings >= 1 && c.ingest.max_body_bytes >= 1024);
                prop_assert!(c.limits.request_timeout_s > 0.0 && c.limits.header_read_timeout_s > 0.0);
                prop_assert!(c.web.session_idle_s <= c.web.session_max_s);
            }
            Err(e) => prop_assert!(!e.to_string().is_empty()),
        }
    }
}
