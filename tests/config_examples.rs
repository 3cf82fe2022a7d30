//! Every example site in `config/` loads without errors.

#[test]
fn every_example_site_loads() {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config");
    let mut count = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_some_and(|e| e == "yaml") {
            count += 1;
            match spillway::config::load_file(&path) {
                Ok(loaded) => assert!(
                    loaded.warnings.is_empty(),
                    "{}",
                    spillway::diag::render(&loaded.source.path, &loaded.source.text, &loaded.warnings, false)
                ),
                Err(e) => panic!("{}", e.render(false)),
            }
        }
    }
    assert!(count >= 1, "no example sites found in {}", dir.display());
}
