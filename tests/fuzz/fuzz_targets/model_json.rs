//! Model descriptions (JSON): any text gives a model or an error.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|text: &str| {
    let _ = ohmline_server::files::read_model("m.json", text);
});
