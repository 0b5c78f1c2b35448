//! Any text as a landmark CSV: Ok or an error naming the line, never a panic.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        if let Ok(items) = ductline::landmarks::parse_csv(text, std::path::Path::new("fuzz.csv"), None) {
            // what parses writes back and parses to the same landmarks
            let again = ductline::landmarks::parse_csv(&ductline::landmarks::to_csv(&items), std::path::Path::new("fuzz.csv"), None).unwrap();
            assert_eq!(again, items);
        }
    }
});
