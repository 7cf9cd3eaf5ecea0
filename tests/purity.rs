//! The core must stay pure: no runtime, database, RPC or clock inside it.

use std::path::Path;

fn rust_files(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    for entry in std::fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        if path.is_dir() {
            rust_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

#[test]
fn pure_modules_do_no_io() {
    let forbidden = [
        "tokio",
        "sqlx",
        "tonic",
        "std::time::SystemTime",
        "Instant::now",
        "std::fs",
        "std::net",
    ];
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    for pure in [
        "electrochem",
        "estimator",
        "alerts/rules.rs",
        "ingest/derive.rs",
        "retention.rs",
        "store/codec.rs",
    ] {
        let p = root.join(pure);
        if p.is_dir() {
            rust_files(&p, &mut files);
        } else if p.exists() {
            files.push(p);
        }
    }
    assert!(!files.is_empty());
    for file in files {
        let text = std::fs::read_to_string(&file).unwrap();
        for word in forbidden {
            assert!(!text.contains(word), "{} mentions {word}", file.display());
        }
    }
}
