//! `ohmline invert` end to end: data written by `ohmline forward` (the
//! project's 2.5D finite-element model) are inverted by the binary, and the
//! files it writes are read back.

use std::path::Path;
use std::process::{Command, Output};

use serde_json::Value;
use tempfile::TempDir;

use crate::support::{BIN, TestLine};

fn run(args: &[&str]) -> Output {
    Command::new(BIN).args(args).env("RUST_LOG", "warn").output().expect("run ohmline")
}

fn ok(args: &[&str]) -> String {
    let out = run(args);
    assert!(
        out.status.success(),
        "ohmline {args:?} failed:\nstdout: {}\nstderr: {}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("utf-8 stdout")
}

fn fails(args: &[&str]) -> String {
    let out = run(args);
    assert!(!out.status.success(), "ohmline {args:?} succeeded");
    String::from_utf8(out.stderr).expect("utf-8 stderr")
}

fn p(dir: &TempDir, name: &str) -> String {
    dir.path().join(name).display().to_string()
}

fn json(path: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

/// Writes the line's electrodes and sequence CSVs into `dir`.
fn line_files(dir: &TempDir, line: &TestLine) {
    std::fs::write(dir.path().join("e.csv"), line.electrodes_csv()).unwrap();
    std::fs::write(dir.path().join("s.csv"), line.sequence_csv()).unwrap();
}

/// Simulates the line's sequence over `model` (JSON) with `noise` percent.
fn forward(dir: &TempDir, model: &str, noise: f64, seed: u64, out: &str) {
    let m = p(dir, &format!("{out}.model.json"));
    std::fs::write(&m, model).unwrap();
    ok(&[
        "forward",
        "--electrodes",
        &p(dir, "e.csv"),
        "--sequence",
        &p(dir, "s.csv"),
        "--model",
        &m,
        "--noise",
        &noise.to_string(),
        "--seed",
        &seed.to_string(),
        "--out",
        &p(dir, out),
    ]);
}

fn check_png(path: &Path) {
    let bytes = std::fs::read(path).unwrap();
    let decoder = png::Decoder::new(std::io::Cursor::new(bytes));
    let reader = decoder.read_info().expect("a PNG");
    let info = reader.info();
    assert_eq!((info.width, info.height), (1400, 700));
}

#[test]
fn homogeneous_half_space_is_recovered_within_one_percent() {
    // On a homogeneous half-space every reading has ρa = ρ (definition of K;
    // Telford, Geldart & Sheriff 1990, *Applied Geophysics*): noise-free data
    // of 100 Ω·m must invert to 100 Ω·m within 1 % wherever the mask allows.
    let dir = TempDir::new().unwrap();
    let line = TestLine::new(24, 1.0, 6);
    line_files(&dir, &line);
    forward(&dir, r#"{"background": 100}"#, 0.0, 1, "d.csv");
    let out = p(&dir, "out");
    let stdout = ok(&[
        "invert",
        "--electrodes",
        &p(&dir, "e.csv"),
        "--data",
        &p(&dir, "d.csv"),
        "--out-dir",
        &out,
    ]);
    println!("{stdout}");
    let out = Path::new(&out);
    let summary = json(&out.join("summary.json"));
    assert_eq!(summary["kind"], "resistivity");
    assert_eq!(summary["converged"], true, "{summary}");
    assert!(summary["chi2_per_datum"].as_f64().unwrap() < 1.1, "{summary}");
    assert_eq!(summary["readings_used"].as_u64().unwrap() as usize, line.sequence.len());
    assert_eq!(summary["readings_dropped"], 0);
    let model = json(&out.join("model.json"));
    let cells = model["cells"].as_array().unwrap();
    let mut kept = 0;
    for c in cells {
        assert!(c["polygon"].as_array().unwrap().len() >= 3);
        if c["in_mask"] == true {
            kept += 1;
            let rho = c["rho_ohm_m"].as_f64().unwrap();
            assert!((rho / 100.0 - 1.0).abs() <= 0.01, "cell at {}: {rho} Ω·m", c["centroid"]);
        }
    }
    assert!(kept * 4 >= cells.len(), "mask keeps {kept} of {} cells", cells.len());
    assert_eq!(model["electrodes"].as_array().unwrap().len(), 24);
    check_png(&out.join("section.png"));
}

#[test]
fn time_lapse_change_is_found_in_place() {
    // A −40 % zone (100 → 60 Ω·m) 3 m wide, 1–3 m deep, between two epochs
    // with 1 % noise: both the ratio (Daily et al. 1992) and the difference
    // (LaBrecque & Yang 2001) inversions must put the strongest drop inside
    // the mask within one electrode spacing of the zone, and the zone's cells
    // must drop on average by more than 10 %.
    let dir = TempDir::new().unwrap();
    let line = TestLine::new(32, 1.0, 8);
    line_files(&dir, &line);
    let zone = [14.0, 17.0, 7.0, 9.0]; // x0, x1, z0, z1 (elevation; surface at 10 m)
    forward(&dir, r#"{"background": 100}"#, 1.0, 11, "b.csv");
    let body = format!(
        r#"{{"background": 100, "bodies": [{{"polygon": [[{x0}, {z1}], [{x1}, {z1}], [{x1}, {z0}], [{x0}, {z0}]], "rho": 60}}]}}"#,
        x0 = zone[0],
        x1 = zone[1],
        z0 = zone[2],
        z1 = zone[3]
    );
    forward(&dir, &body, 1.0, 12, "d.csv");
    let dist = |c: &Value| {
        let (x, z) = (c[0].as_f64().unwrap(), c[1].as_f64().unwrap());
        let dx = (zone[0] - x).max(x - zone[1]).max(0.0);
        let dz = (zone[2] - z).max(z - zone[3]).max(0.0);
        dx.hypot(dz)
    };
    for mode in ["ratio", "difference"] {
        let out = p(&dir, &format!("out-{mode}"));
        let stdout = ok(&[
            "invert",
            "--electrodes",
            &p(&dir, "e.csv"),
            "--data",
            &p(&dir, "d.csv"),
            "--baseline",
            &p(&dir, "b.csv"),
            "--mode",
            mode,
            "--out-dir",
            &out,
        ]);
        println!("{mode}: {stdout}");
        let out = Path::new(&out);
        let summary = json(&out.join("summary.json"));
        assert_eq!(summary["mode"], mode);
        assert_eq!(
            summary["change"]["readings_used"].as_u64().unwrap() as usize,
            line.sequence.len()
        );
        let model = json(&out.join("model.json"));
        let cells = model["cells"].as_array().unwrap();
        let (mut strongest, mut at) = (0.0, Value::Null);
        let (mut zone_sum, mut zone_area) = (0.0, 0.0);
        for c in cells.iter().filter(|c| c["in_mask"] == true) {
            let pc = c["change_pct"].as_f64().unwrap();
            if pc < strongest {
                strongest = pc;
                at = c["centroid"].clone();
            }
            if dist(&c["centroid"]) == 0.0 {
                zone_sum += pc;
                zone_area += 1.0;
            }
        }
        let zone_mean = zone_sum / zone_area;
        println!("{mode}: strongest {strongest:.1} % at {at}, zone mean {zone_mean:.1} %");
        assert!(dist(&at) <= 1.0, "{mode}: strongest drop {strongest} % at {at}");
        assert!(zone_mean < -10.0, "{mode}: zone mean {zone_mean} %");
        check_png(&out.join("section.png"));
    }
}

#[test]
fn bad_input_is_named_by_file_row_and_field() {
    let dir = TempDir::new().unwrap();
    let line = TestLine::new(8, 1.0, 1);
    line_files(&dir, &line);
    let e = p(&dir, "e.csv");
    let write = |name: &str, text: &str| {
        let path = p(&dir, name);
        std::fs::write(&path, text).unwrap();
        path
    };
    let invert = |data: &str| {
        fails(&["invert", "--electrodes", &e, "--data", data, "--out-dir", &p(&dir, "o")])
    };
    // A value that is not a number.
    let d = write("bad-number.csv", "a,b,m,n,resistance_ohm\nE1,E4,E2,E3,1.5\nE2,E5,E3,E4,abc\n");
    let err = invert(&d);
    assert!(err.contains(&format!("{d}: row 3, field resistance_ohm")), "{err}");
    assert!(err.contains("not a finite number"), "{err}");
    // An electrode that is not on the line.
    let d = write("bad-label.csv", "a,b,m,n,resistance_ohm\nE1,E4,E2,E3,1.5\nE1,E9,E2,E3,1.5\n");
    let err = invert(&d);
    assert!(err.contains(&format!("{d}: row 3, field b")), "{err}");
    assert!(err.contains("unknown electrode label \"E9\""), "{err}");
    // Neither a resistance nor current and voltage.
    let d = write("bad-columns.csv", "a,b,m,n,current_ma\nE1,E4,E2,E3,100\n");
    let err = invert(&d);
    assert!(err.contains(&format!("{d}: row 1, field resistance_ohm")), "{err}");
    // A repeated quadrupole.
    let d = write("repeat.csv", "a,b,m,n,resistance_ohm\nE1,E4,E2,E3,1.5\nE1,E4,E2,E3,1.6\n");
    let err = invert(&d);
    assert!(err.contains("row 3, field a,b,m,n: repeats the quadrupole of row 2"), "{err}");
    // A non-positive current.
    let d = write("current.csv", "a,b,m,n,current_ma,voltage_mv\nE1,E4,E2,E3,0,5\n");
    let err = invert(&d);
    assert!(err.contains("row 2, field current_ma"), "{err}");
    // A bad electrodes file names its row and column.
    let bad_e = write("bad-e.csv", "label,x,z\nE1,0,10\nE2,one,10\n");
    let err = fails(&["invert", "--electrodes", &bad_e, "--data", &d, "--out-dir", &p(&dir, "o")]);
    assert!(err.contains(&format!("{bad_e}, row 3, column x")), "{err}");
    // A bad baseline file is named too.
    let good = write("good.csv", "a,b,m,n,resistance_ohm\nE1,E4,E2,E3,1.5\n");
    let bad_b = write("bad-b.csv", "a,b,m,n,resistance_ohm\nE1,E4,E2,,x\n");
    let err = fails(&[
        "invert",
        "--electrodes",
        &e,
        "--data",
        &good,
        "--baseline",
        &bad_b,
        "--out-dir",
        &p(&dir, "o"),
    ]);
    assert!(err.contains(&format!("{bad_b}: row 2, field resistance_ohm")), "{err}");
    // Error model options are checked.
    let err = fails(&["invert", "--electrodes", &e, "--data", &good, "--error-relative=-1"]);
    assert!(err.contains("--error-relative must be a finite number ≥ 0"), "{err}");
    assert!(!dir.path().join("o").exists(), "nothing is written on bad input");
}

#[test]
fn plan_writes_a_sequence_the_line_commands_read() {
    // `ohmline plan` for 24 electrodes at 2 m: Wenner a = 1…4 and
    // dipole–dipole a = 1…4, n = 1…3 with reciprocals. Counts (common
    // combinatorics, N − span positions): Wenner Σ (24 − 3a) = 66,
    // dipole–dipole Σ_a Σ_n (24 − (n + 2)a) = 60 + 48 + 36 + 24 = 168, doubled
    // by reciprocals.
    let dir = TempDir::new().unwrap();
    let out = p(&dir, "plan");
    let stdout = ok(&[
        "plan",
        "--electrodes",
        "24",
        "--spacing",
        "2",
        "--arrays",
        "wenner,dipole-dipole",
        "--max-a",
        "4",
        "--max-n",
        "3",
        "--reciprocals",
        "--channels",
        "4",
        "--time-per-measurement",
        "1",
        "--out-dir",
        &out,
    ]);
    println!("{stdout}");
    let out = Path::new(&out);
    let plan = json(&out.join("plan.json"));
    assert_eq!(plan["arrays"][0]["generated"], 66);
    assert_eq!(plan["arrays"][1]["generated"], 168);
    assert_eq!(plan["quadrupoles"], 2 * (66 + 168));
    assert!(plan["detectability"].is_null());
    let (_, line) = ohmline_server::files::read_electrodes(
        "electrodes.csv",
        &std::fs::read_to_string(out.join("electrodes.csv")).unwrap(),
    )
    .unwrap();
    let seq = ohmline_server::files::read_sequence(
        "sequence.csv",
        &std::fs::read_to_string(out.join("sequence.csv")).unwrap(),
        &line,
    )
    .unwrap();
    assert_eq!(seq.len(), 2 * (66 + 168));
    assert_eq!(seq.reciprocal_pairs().count(), 66 + 168);
    let bytes = std::fs::read(out.join("sensitivity.png")).unwrap();
    assert!(png::Decoder::new(std::io::Cursor::new(bytes)).read_info().is_ok());
    // A malformed target names the key.
    let err = fails(&[
        "plan",
        "--electrodes",
        "24",
        "--spacing",
        "2",
        "--target",
        "x=20,width=2,depth=two,height=2,change=-30",
    ]);
    assert!(err.contains("--target: depth = \"two\" is not a finite number"), "{err}");
}
