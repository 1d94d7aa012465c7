//! Readers for the project's input files, with errors that name the file, the
//! row (1-based line number) and the column.
//!
//! - electrodes CSV: columns `label,x,z` (metres; x chainage, z elevation), optional
//!   `easting,northing`; one electrode per row in cable order.
//! - sequence CSV: columns `a,b,m,n` holding electrode labels; an empty `b` or `n`
//!   is a remote electrode.
//! - surface CSV: columns `x,z`, extra ground-surface points (levee crest edges,
//!   toes) beyond the electrodes.

use std::collections::HashMap;

use ohmline_core::geometry::{Electrode, LineGeometry};
use ohmline_core::sequence::{Quadrupole, Sequence};
use thiserror::Error;

use crate::db::lines::NewElectrode;

/// A problem in an input file.
#[derive(Debug, Error, PartialEq)]
#[error("{file}{}{}: {message}", row.map(|r| format!(", row {r}")).unwrap_or_default(), column.as_ref().map(|c| format!(", column {c}")).unwrap_or_default())]
pub struct FileError {
    /// File name as given by the user.
    pub file: String,
    /// 1-based line number.
    pub row: Option<usize>,
    /// Column name.
    pub column: Option<String>,
    /// What is wrong.
    pub message: String,
}

struct Table<'a> {
    file: &'a str,
    headers: Vec<String>,
    rows: Vec<(usize, csv::StringRecord)>,
}

impl<'a> Table<'a> {
    fn read(file: &'a str, text: &str, required: &[&str]) -> Result<Self, FileError> {
        let err = |row: Option<usize>, column: Option<&str>, message: String| FileError {
            file: file.to_string(),
            row,
            column: column.map(str::to_string),
            message,
        };
        let mut rdr = csv::ReaderBuilder::new()
            .trim(csv::Trim::All)
            .comment(Some(b'#'))
            .from_reader(text.strip_prefix('\u{feff}').unwrap_or(text).as_bytes());
        let headers: Vec<String> = rdr
            .headers()
            .map_err(|e| err(Some(1), None, format!("cannot read the header: {e}")))?
            .iter()
            .map(|h| h.to_ascii_lowercase())
            .collect();
        for r in required {
            if !headers.iter().any(|h| h == r) {
                return Err(err(
                    Some(1),
                    Some(r),
                    format!("required column is missing (columns: {})", required.join(",")),
                ));
            }
        }
        let mut rows = Vec::new();
        for rec in rdr.records() {
            let rec = rec.map_err(|e| {
                let row = e.position().map(|p| p.line() as usize);
                let msg = match e.kind() {
                    csv::ErrorKind::UnequalLengths { expected_len, len, .. } => {
                        format!("has {len} fields, the header has {expected_len}")
                    }
                    _ => format!("cannot be read: {e}"),
                };
                err(row, None, msg)
            })?;
            if rec.iter().all(str::is_empty) {
                continue;
            }
            let line = rec.position().map_or(0, |p| p.line() as usize);
            rows.push((line, rec));
        }
        Ok(Self { file, headers, rows })
    }

    fn get<'r>(&self, rec: &'r csv::StringRecord, col: &str) -> Option<&'r str> {
        let i = self.headers.iter().position(|h| h == col)?;
        rec.get(i).filter(|s| !s.is_empty())
    }

    fn error(&self, row: usize, column: &str, message: impl Into<String>) -> FileError {
        FileError {
            file: self.file.to_string(),
            row: Some(row),
            column: Some(column.to_string()),
            message: message.into(),
        }
    }

    fn number(
        &self,
        row: usize,
        rec: &csv::StringRecord,
        col: &str,
    ) -> Result<Option<f64>, FileError> {
        match self.get(rec, col) {
            None => Ok(None),
            Some(s) => match s.parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(Some(v)),
                _ => Err(self.error(row, col, format!("{s:?} is not a finite number"))),
            },
        }
    }

    fn required_number(
        &self,
        row: usize,
        rec: &csv::StringRecord,
        col: &str,
    ) -> Result<f64, FileError> {
        self.number(row, rec, col)?.ok_or_else(|| self.error(row, col, "value is required"))
    }
}

/// Reads an electrodes CSV and validates it as a line.
pub fn read_electrodes(
    file: &str,
    text: &str,
) -> Result<(Vec<NewElectrode>, LineGeometry), FileError> {
    let t = Table::read(file, text, &["label", "x", "z"])?;
    let mut out = Vec::with_capacity(t.rows.len());
    let mut rows = Vec::with_capacity(t.rows.len());
    for (row, rec) in &t.rows {
        let label =
            t.get(rec, "label").ok_or_else(|| t.error(*row, "label", "value is required"))?;
        out.push(NewElectrode {
            label: label.to_string(),
            x: t.required_number(*row, rec, "x")?,
            z: t.required_number(*row, rec, "z")?,
            easting: t.number(*row, rec, "easting")?,
            northing: t.number(*row, rec, "northing")?,
        });
        rows.push(*row);
    }
    let geometry =
        LineGeometry::new(out.iter().map(|e| Electrode::new(&e.label, e.x, e.z)).collect())
            .map_err(|e| {
                use ohmline_core::geometry::GeometryError as G;
                let (row, column) = match &e {
                    G::EmptyLabel { index } | G::DuplicateLabel { index, .. } => {
                        (rows.get(*index).copied(), Some("label"))
                    }
                    G::NonFinite { label, field } => {
                        (out.iter().position(|x| &x.label == label).map(|i| rows[i]), Some(*field))
                    }
                    G::NotIncreasing { label, .. } => {
                        (out.iter().position(|x| &x.label == label).map(|i| rows[i]), Some("x"))
                    }
                    G::TooFewElectrodes(_) => (None, None),
                };
                FileError {
                    file: file.to_string(),
                    row,
                    column: column.map(str::to_string),
                    message: e.to_string(),
                }
            })?;
    Ok((out, geometry))
}

/// Reads a sequence CSV for a line.
pub fn read_sequence(file: &str, text: &str, line: &LineGeometry) -> Result<Sequence, FileError> {
    let t = Table::read(file, text, &["a", "b", "m", "n"])?;
    let mut quads = Vec::with_capacity(t.rows.len());
    let mut rows = Vec::with_capacity(t.rows.len());
    for (row, rec) in &t.rows {
        let electrode = |col: &str| -> Result<Option<usize>, FileError> {
            match t.get(rec, col) {
                None => Ok(None),
                Some(l) => line
                    .index_of(l)
                    .map(Some)
                    .ok_or_else(|| t.error(*row, col, format!("unknown electrode label {l:?}"))),
            }
        };
        let required = |col: &str| -> Result<usize, FileError> {
            electrode(col)?.ok_or_else(|| t.error(*row, col, "electrode label is required"))
        };
        quads.push(Quadrupole {
            a: required("a")?,
            b: electrode("b")?,
            m: required("m")?,
            n: electrode("n")?,
        });
        rows.push(*row);
    }
    Sequence::new(quads, line.len()).map_err(|e| {
        use ohmline_core::sequence::SequenceError as S;
        let row = match &e {
            S::NotDistinct { index }
            | S::Duplicate { index, .. }
            | S::ElectrodeOutOfRange { index, .. } => rows.get(*index).copied(),
            S::Empty => None,
        };
        let msg = match &e {
            S::Duplicate { first, .. } => format!("repeats the quadrupole of row {}", rows[*first]),
            S::NotDistinct { .. } => "electrodes a, b, m, n must be distinct".to_string(),
            _ => e.to_string(),
        };
        FileError { file: file.to_string(), row, column: Some("a,b,m,n".into()), message: msg }
    })
}

/// Reads extra ground-surface points.
pub fn read_surface(file: &str, text: &str) -> Result<Vec<[f64; 2]>, FileError> {
    let t = Table::read(file, text, &["x", "z"])?;
    let mut seen: HashMap<u64, usize> = HashMap::new();
    let mut out = Vec::with_capacity(t.rows.len());
    for (row, rec) in &t.rows {
        let x = t.required_number(*row, rec, "x")?;
        if let Some(first) = seen.insert(x.to_bits(), *row) {
            return Err(t.error(*row, "x", format!("x = {x} is already given on row {first}")));
        }
        out.push([x, t.required_number(*row, rec, "z")?]);
    }
    Ok(out)
}

/// Writes a sequence as CSV (labels), the format [`read_sequence`] reads.
pub fn write_sequence(seq: &Sequence, line: &LineGeometry) -> String {
    let label =
        |i: Option<usize>| i.map(|i| line.electrodes()[i].label().to_string()).unwrap_or_default();
    let mut s = String::from("a,b,m,n\n");
    for q in seq.quadrupoles() {
        s.push_str(&format!(
            "{},{},{},{}\n",
            label(Some(q.a)),
            label(q.b),
            label(Some(q.m)),
            label(q.n)
        ));
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    const ELECTRODES: &str = "label,x,z\nE1,0,10\nE2,1,10\nE3,2,10.1\nE4,3,10.2\n";

    #[test]
    fn electrodes_and_sequence_round_trip() {
        let (new, line) = read_electrodes("e.csv", ELECTRODES).unwrap();
        assert_eq!(new.len(), 4);
        assert_eq!(line.index_of("E3"), Some(2));
        let seq = read_sequence("q.csv", "a,b,m,n\nE1,E4,E2,E3\nE1,,E2,\n", &line).unwrap();
        assert_eq!(seq.quadrupoles()[1], Quadrupole { a: 0, b: None, m: 1, n: None });
        let again = read_sequence("q.csv", &write_sequence(&seq, &line), &line).unwrap();
        assert_eq!(again, seq);
    }

    #[test]
    fn errors_name_file_row_and_column() {
        let e = read_electrodes("e.csv", "label,x,z\nE1,0,0\nE2,abc,0\n").unwrap_err();
        assert_eq!((e.row, e.column.as_deref()), (Some(3), Some("x")));
        assert_eq!(e.to_string(), "e.csv, row 3, column x: \"abc\" is not a finite number");
        let e =
            read_electrodes("e.csv", "label,x,z\nE1,0,0\nE2,1,0\nE1,2,0\nE4,3,0\n").unwrap_err();
        assert_eq!((e.row, e.column.as_deref()), (Some(4), Some("label")));
        let e = read_electrodes("e.csv", "label,x\nE1,0\n").unwrap_err();
        assert_eq!(e.column.as_deref(), Some("z"));
        let (_, line) = read_electrodes("e.csv", ELECTRODES).unwrap();
        let e = read_sequence("q.csv", "a,b,m,n\nE1,E4,E2,E3\nE1,E9,E2,E3\n", &line).unwrap_err();
        assert_eq!((e.row, e.column.as_deref()), (Some(3), Some("b")));
        let e = read_sequence("q.csv", "a,b,m,n\nE1,E4,E2,E3\nE1,E4,E2,E3\n", &line).unwrap_err();
        assert_eq!(e.row, Some(3));
        assert!(e.message.contains("row 2"), "{}", e.message);
        let e = read_sequence("q.csv", "a,b,m,n\nE1,E1,E2,E3\n", &line).unwrap_err();
        assert_eq!(e.row, Some(2));
    }
}

/// Reads a model description (JSON):
/// `{"background": ρ, "layers": [{"top": z, "rho": ρ}], "bodies": [{"polygon": [[x, z], ...], "rho": ρ}]}`
/// with z as elevation in metres (up positive), ρ in Ω·m. Layers fill everything
/// below their `top`; bodies override; later entries win. Errors name the entry
/// (e.g. `bodies[1].polygon[3]`).
pub fn read_model(
    file: &str,
    text: &str,
) -> Result<ohmline_core::model::ModelDescription, FileError> {
    use ohmline_core::model::{Body, Layer, ModelDescription, ModelError};
    use serde_json::Value;
    let err = |column: String, message: String| FileError {
        file: file.to_string(),
        row: None,
        column: Some(column),
        message,
    };
    let v: Value = serde_json::from_str(text).map_err(|e| FileError {
        file: file.to_string(),
        row: Some(e.line()),
        column: None,
        message: format!("not valid JSON (column {}): {e}", e.column()),
    })?;
    let obj =
        v.as_object().ok_or_else(|| err("(top level)".into(), "must be a JSON object".into()))?;
    for k in obj.keys() {
        if !["background", "layers", "bodies"].contains(&k.as_str()) {
            return Err(err(k.clone(), "unknown key (expected background, layers, bodies)".into()));
        }
    }
    let num = |v: Option<&Value>, path: String| -> Result<f64, FileError> {
        match v.and_then(Value::as_f64) {
            Some(x) if x.is_finite() => Ok(x),
            _ => Err(err(path, "must be a finite number".into())),
        }
    };
    let background = num(obj.get("background"), "background".into())?;
    let arr = |k: &str| -> Result<Vec<Value>, FileError> {
        match obj.get(k) {
            None => Ok(Vec::new()),
            Some(Value::Array(a)) => Ok(a.clone()),
            Some(_) => Err(err(k.into(), "must be an array".into())),
        }
    };
    let mut layers = Vec::new();
    for (i, l) in arr("layers")?.iter().enumerate() {
        layers.push(Layer {
            top: num(l.get("top"), format!("layers[{i}].top"))?,
            rho: num(l.get("rho"), format!("layers[{i}].rho"))?,
        });
    }
    let mut bodies = Vec::new();
    for (i, b) in arr("bodies")?.iter().enumerate() {
        let pts = b.get("polygon").and_then(Value::as_array).ok_or_else(|| {
            err(format!("bodies[{i}].polygon"), "must be an array of [x, z] pairs".into())
        })?;
        let mut polygon = Vec::with_capacity(pts.len());
        for (j, p) in pts.iter().enumerate() {
            let path = format!("bodies[{i}].polygon[{j}]");
            let pair = p
                .as_array()
                .filter(|a| a.len() == 2)
                .ok_or_else(|| err(path.clone(), "must be an [x, z] pair".into()))?;
            polygon.push([num(pair.first(), path.clone())?, num(pair.get(1), path)?]);
        }
        bodies.push(Body { polygon, rho: num(b.get("rho"), format!("bodies[{i}].rho"))? });
    }
    ModelDescription::new(background, layers, bodies).map_err(|e: ModelError| FileError {
        file: file.to_string(),
        row: None,
        column: None,
        message: e.to_string(),
    })
}

#[cfg(test)]
mod model_tests {
    use super::*;

    #[test]
    fn model_json_is_read_and_errors_name_the_entry() {
        let m = read_model(
            "m.json",
            r#"{"background": 100, "layers": [{"top": -2, "rho": 10}],
                "bodies": [{"polygon": [[0, 0], [2, 0], [2, -2], [0, -2]], "rho": 5}]}"#,
        )
        .unwrap();
        assert_eq!(m.resistivity_at(1.0, -1.0), 5.0);
        assert_eq!(m.resistivity_at(10.0, -5.0), 10.0);
        assert_eq!(m.resistivity_at(10.0, -1.0), 100.0);
        let e = read_model(
            "m.json",
            r#"{"background": 100, "bodies": [{"polygon": [[0, 0], [2, "x"]], "rho": 5}]}"#,
        )
        .unwrap_err();
        assert_eq!(e.column.as_deref(), Some("bodies[0].polygon[1]"));
        let e = read_model("m.json", r#"{"background": -1}"#).unwrap_err();
        assert!(e.message.contains("resistiv"), "{e}");
        let e = read_model(
            "m.json",
            r#"{"background": 1, "bodies": [{"polygon": [[0, 0], [2, -2], [2, 0], [0, -2]], "rho": 5}]}"#,
        )
        .unwrap_err();
        assert!(e.message.contains("intersects itself"), "{e}");
        let e = read_model("m.json", r#"{"background": 1, "layer": []}"#).unwrap_err();
        assert_eq!(e.column.as_deref(), Some("layer"));
    }
}
