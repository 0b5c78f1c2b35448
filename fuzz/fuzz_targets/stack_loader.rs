//! Any bytes as a TIFF file: the loader must return Ok or a clean error, never panic or hang,
//! and never allocate past the cap.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let dir = std::env::temp_dir().join(format!("ductline-fuzz-{}", std::process::id()));
    let _ = std::fs::create_dir_all(&dir);
    let p = dir.join("input.tif");
    if std::fs::write(&p, data).is_ok() {
        let opts = ductline::stack::LoadOptions { max_bytes: Some(64 << 20), ..Default::default() };
        let _ = ductline::stack::load(&p, &opts);
        let _ = ductline::stack::header(&p);
    }
});
