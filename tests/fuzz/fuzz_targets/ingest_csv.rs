//! Epoch uploads as CSV: any bytes give an epoch or an error.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(e) = ohmline_server::ingest::parse::parse_csv(data, 1000) {
        assert!(e.readings.len() <= 1000);
    }
});
