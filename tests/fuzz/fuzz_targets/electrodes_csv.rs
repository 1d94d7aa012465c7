//! Electrodes CSV: any text gives a line or an error.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|text: &str| {
    if let Ok((rows, line)) = ohmline_server::files::read_electrodes("e.csv", text) {
        assert_eq!(rows.len(), line.len());
    }
});
