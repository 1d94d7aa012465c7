//! Sequence CSV against a 24-electrode line: any text gives a sequence or an
//! error.
#![no_main]
use libfuzzer_sys::fuzz_target;
use ohmline_core::geometry::{Electrode, LineGeometry};

fuzz_target!(|text: &str| {
    let line = LineGeometry::new(
        (0..24).map(|i| Electrode::new(format!("E{}", i + 1), i as f64, 10.0)).collect(),
    )
    .expect("a valid line");
    if let Ok(seq) = ohmline_server::files::read_sequence("q.csv", text, &line) {
        for q in seq.quadrupoles() {
            assert!([Some(q.a), q.b, Some(q.m), q.n].iter().flatten().all(|&i| i < 24));
        }
    }
});
