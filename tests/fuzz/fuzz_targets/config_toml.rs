//! The configuration loader: any TOML text gives a checked configuration or
//! an error.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|text: &str| {
    if let Ok(c) = ohmline_server::config::Config::from_toml(text) {
        assert!(c.ingest.max_readings >= 1);
        assert!(c.web.session_idle_s <= c.web.session_max_s);
    }
});
