//! Any text as a project file: Ok or a clean error, never a panic; what loads saves and loads again.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        if let Ok(p) = ductline::project::Project::parse(text, std::path::Path::new("fuzz.json")) {
            let back = ductline::project::Project::parse(&p.to_json(), std::path::Path::new("fuzz.json")).unwrap();
            assert_eq!(back.to_json(), p.to_json());
        }
    }
});
