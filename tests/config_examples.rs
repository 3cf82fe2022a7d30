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
                Ok(loaded) => {
                    assert!(
                        loaded.warnings.is_empty(),
                        "{}",
                        spillway::diag::render(&loaded.source.path, &loaded.source.text, &loaded.warnings, false)
                    );
                    // Nor a warning about its offline sections (`check` counts both).
                    let plant = spillway::offline::checked_plant(&loaded).unwrap();
                    let notes = spillway::offline::plausible::notes(&loaded, &plant);
                    assert!(notes.is_empty(), "{}: {notes:?}", path.display());
                }
                Err(e) => panic!("{}", e.render(false)),
            }
        }
    }
    assert!(count >= 1, "no example sites found in {}", dir.display());
}

/// Every example site carries a `plant:` section that builds into a simulated plant.
#[test]
fn every_example_site_has_a_plant_that_builds() {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config");
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_none_or(|e| e != "yaml") {
            continue;
        }
        let text = std::fs::read_to_string(&path).unwrap();
        let plant = spillway_sim::site::from_site_yaml(&text)
            .unwrap_or_else(|e| panic!("{}: {e}", path.display()))
            .unwrap_or_else(|| panic!("{} has no plant section", path.display()));
        let options = spillway_sim::site::SiteOptions { start_ms: 1_781_481_600_000, seed: 1, sky: None };
        let mut p = spillway_sim::site::build(&plant, &options).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
        for _ in 0..3600 {
            p.step(1.0);
        }
    }
}

/// `spillway check` exits 0 on every example and prints the model; it exits 1 on every
/// broken fixture with the file, line and column of the first problem.
#[test]
fn spillway_check_exits_zero_on_examples_and_one_on_broken_files() {
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    for dir in ["config", "tests/test_data/broken"] {
        for entry in std::fs::read_dir(root.join(dir)).unwrap() {
            let path = entry.unwrap().path();
            if path.extension().is_none_or(|e| e != "yaml") {
                continue;
            }
            let out =
                std::process::Command::new(env!("CARGO_BIN_EXE_spillway")).arg("check").arg(&path).output().unwrap();
            let stdout = String::from_utf8_lossy(&out.stdout);
            let stderr = String::from_utf8_lossy(&out.stderr);
            if dir == "config" {
                assert!(out.status.success(), "{}: {stderr}", path.display());
                assert!(stdout.contains("loads, in priority order"), "{stdout}");
                // The simulated tank's model is named: the examples' tanks are layered.
                let has_tank = std::fs::read_to_string(&path).unwrap().contains("\n  tank:\n");
                assert_eq!(stdout.contains(" L in 8 layers, every point"), has_tank, "{}: {stdout}", path.display());
            } else {
                assert_eq!(out.status.code(), Some(1), "{}: {stdout}{stderr}", path.display());
                let name = path.file_name().unwrap().to_string_lossy().into_owned();
                assert!(stderr.contains(&format!("{name}:")), "{stderr}");
            }
        }
    }
}

/// An off-grid site has no grid meter, no export guard and (the cabin) no inverter
/// section: what `check` and the start-up banner say of it must fit.
#[test]
fn an_off_grid_site_is_described_without_grid_only_terms() {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/off-grid-cabin.yaml");
    let site = spillway::config::load_file(&path).unwrap_or_else(|e| panic!("{}", e.render(false))).site;
    assert!(site.inverter.is_none());
    let described = spillway::config::describe::describe(&site);
    let banner = spillway::daemon::banner::lines(&site, "test").join("\n");
    for text in [&described, &banner] {
        for grid_only in ["export guard", "import target", "safe limit", "export-limitation", "export: off-grid"] {
            assert!(!text.contains(grid_only), "`{grid_only}` on an off-grid site:\n{text}");
        }
    }
    assert!(banner.contains("site: Alder Hut   off-grid   loads: 2"), "{banner}");
    assert!(banner.contains("relays open or in their safe state."), "{banner}");
}
