//! The project file: round trips, atomic saves, versions, and the stack-changed warning.

use ductline::landmarks::{Kind, Landmark};
use ductline::project::{FORMAT_VERSION, Project, write_atomic};

fn sample(dir: &std::path::Path) -> (Project, std::path::PathBuf) {
    let stack = dir.join("stack.tif");
    std::fs::write(&stack, b"pretend stack bytes").unwrap();
    let path = dir.join("sub").join("p.ductline.json");
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    let mut p = Project::new(&stack, &path).unwrap();
    p.landmarks = vec![Landmark { kind: Kind::Lamina, p: [0.1, 1.0 / 3.0, 2.5e-7] }, Landmark { kind: Kind::Window, p: [9.0, 8.0, 7.0] }];
    p.overrides.push(ductline::measure::Override { s_mm: 1.2, exclude: true, ..Default::default() });
    (p, path)
}

#[test]
fn save_load_save_is_byte_identical() {
    let dir = tempfile::tempdir().unwrap();
    let (p, path) = sample(dir.path());
    assert_eq!(p.stack.path, "../stack.tif", "stack path relative to the project");
    p.save(&path).unwrap();
    let first = std::fs::read(&path).unwrap();
    let back = Project::load(&path).unwrap();
    assert_eq!(back, p);
    back.save(&path).unwrap();
    assert_eq!(std::fs::read(&path).unwrap(), first);
    assert_eq!(back.stack_path(&path), path.parent().unwrap().join("../stack.tif"));
    assert!(back.stack_changed(&path).is_none());
    std::fs::write(dir.path().join("stack.tif"), b"pretend stack bytes, edited").unwrap();
    assert!(back.stack_changed(&path).unwrap().contains("changed"));
}

#[test]
fn newer_versions_are_refused_older_migrated() {
    let dir = tempfile::tempdir().unwrap();
    let (p, path) = sample(dir.path());
    let mut v: serde_json::Value = serde_json::from_str(&p.to_json()).unwrap();
    v["version"] = serde_json::json!(FORMAT_VERSION + 1);
    let e = Project::parse(&v.to_string(), &path).unwrap_err().to_string();
    assert!(e.contains("newer") && e.contains("p.ductline.json"), "{e}");
    // format 1: voxel size in mm under voxel_mm, no overrides
    let mut v1: serde_json::Value = serde_json::from_str(&p.to_json()).unwrap();
    let o = v1.as_object_mut().unwrap();
    o.insert("version".into(), serde_json::json!(1));
    o.remove("voxel_um");
    o.remove("overrides");
    o.insert("voxel_mm".into(), serde_json::json!([0.02, 0.02, 0.025]));
    let m = Project::parse(&serde_json::Value::Object(o.clone()).to_string(), &path).unwrap();
    assert_eq!(m.version, FORMAT_VERSION);
    let um = m.voxel_um.unwrap();
    assert!((um[0] - 20.0).abs() < 1e-9 && (um[2] - 25.0).abs() < 1e-9);
    assert!(m.overrides.is_empty());
    // not a project
    assert!(Project::parse("{\"a\": 1}", &path).unwrap_err().to_string().contains("not a ductline project"));
    assert!(Project::parse("{", &path).unwrap_err().to_string().contains("JSON"));
}

#[test]
fn atomic_write_replaces_whole_files() {
    let dir = tempfile::tempdir().unwrap();
    let f = dir.path().join("x.json");
    write_atomic(&f, b"old").unwrap();
    write_atomic(&f, b"new contents").unwrap();
    assert_eq!(std::fs::read(&f).unwrap(), b"new contents");
    // no temporary files left behind
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    // a folder that does not exist: an error naming the file, nothing written
    let bad = dir.path().join("missing").join("y.json");
    assert!(write_atomic(&bad, b"z").unwrap_err().to_string().contains("y.json"));
}
