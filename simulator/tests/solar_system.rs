//! The assembled PV system as the plant sees it: yields, clouds, the power limit,
//! shading and layouts, configuration files and measured series.

use chrono::NaiveDate;
use spillway_sim::pv::{LocationConfig, SolarConfig, layout_gap, simulate_day};
use spillway_sim::pv_output::{PvSample, PvSource};
use spillway_sim::weather::{MeasuredConfig, WeatherConfig, WeatherKind};

fn munich() -> LocationConfig {
    LocationConfig { latitude: 48.14, longitude: 11.58, altitude: 520.0, timezone: "Europe/Berlin".into() }
}

fn spring_day() -> NaiveDate {
    NaiveDate::from_ymd_opt(2025, 4, 15).unwrap()
}

/// 2.25 kWp: 6 modules of 375 Wp, south, 30°, PVWatts default losses (14 %).
fn small_roof() -> SolarConfig {
    serde_saphyr::from_str(
        "arrays:\n  - name: roof\n    tilt: 30°\n    azimuth: 180°\n    strings:\n      - { modules: 6, module_power: 375Wp }\n",
    )
    .unwrap()
}

fn weather(kind: WeatherKind) -> WeatherConfig {
    WeatherConfig { sky: kind, ..WeatherConfig::default() }
}

fn day_kwh(cfg: &SolarConfig, w: &WeatherConfig, seed: u64, step_s: f64) -> f64 {
    let mut system = cfg.build(&munich(), w, seed).unwrap();
    simulate_day(&mut system, spring_day(), step_s, |_, _| {}).ac_kwh
}

#[test]
fn spring_yields_are_plausible_for_clear_and_overcast_days() {
    // common practice: a 2.25 kWp array on a sunny spring day at a mid-latitude yields
    // roughly 11–15 kWh with typical losses, and roughly half of that when overcast.
    let cfg = small_roof();
    let clear = day_kwh(&cfg, &weather(WeatherKind::Clear), 7, 60.0);
    assert!((11.0..=15.0).contains(&clear), "clear day {clear:.2} kWh");
    let overcast: Vec<f64> = (0..4).map(|seed| day_kwh(&cfg, &weather(WeatherKind::Overcast), seed, 10.0)).collect();
    for o in &overcast {
        let ratio = o / clear;
        assert!((0.3..=0.7).contains(&ratio), "overcast/clear = {ratio:.2} ({o:.2} kWh)");
    }
    let mixed: Vec<f64> = (0..4).map(|seed| day_kwh(&cfg, &weather(WeatherKind::Mixed), seed, 10.0)).collect();
    for m in &mixed {
        assert!(*m > 0.3 * clear && *m < clear, "mixed day {m:.2} kWh vs clear {clear:.2}");
    }
}

fn noon_series(kind: WeatherKind, seed: u64, seconds: i64) -> Vec<PvSample> {
    let mut system = small_roof().build(&munich(), &weather(kind), seed).unwrap();
    // 10:00–… UTC = 12:00 local (CEST).
    let start = 1_744_711_200_000_i64;
    (0..seconds).map(|i| system.step(start + i * 1000, 1.0, None)).collect()
}

#[test]
fn broken_clouds_make_realistic_sub_minute_ramps_reproducibly() {
    let a = noon_series(WeatherKind::Mixed, 42, 4 * 3600);
    let b = noon_series(WeatherKind::Mixed, 42, 4 * 3600);
    let c = noon_series(WeatherKind::Mixed, 43, 4 * 3600);
    assert_eq!(a, b, "same seed, same weather");
    assert_ne!(a, c, "another seed, other weather");
    let nameplate = 2250.0;
    let ac: Vec<f64> = a.iter().map(|s| s.ac_w).collect();
    // Cloud edges: swings of ≥ 30 % of nameplate within 20 s …
    let big_ramps = ac.windows(21).filter(|w| (w[20] - w[0]).abs() >= 0.3 * nameplate).count();
    assert!(big_ramps > 0, "no cloud-edge ramps in four hours of mixed sky");
    // … but not as steps: no single second moves more than 15 % of nameplate.
    let worst_1s = ac.windows(2).map(|w| (w[1] - w[0]).abs()).fold(0.0, f64::max);
    assert!(worst_1s < 0.15 * nameplate, "1 s jump of {worst_1s:.0} W");
    for s in &a {
        assert!((0.0..=1.4).contains(&s.clear_sky_index), "{s:?}");
        assert!(s.ac_w <= s.available_ac_w + 1e-9 && s.ac_w >= 0.0);
    }
}

#[test]
fn inverter_cuts_to_its_limit_at_once_and_ramps_back_when_released() {
    let start = 1_744_711_200_000_i64; // local noon, clear sky
    let mut system = small_roof().build(&munich(), &weather(WeatherKind::Clear), 1).unwrap();
    let rated = system.rated_ac_w();
    let before = system.step(start, 1.0, None);
    assert!(before.ac_w > 1500.0, "{before:?}");
    // A reduction takes effect within the step (common practice for grid-code compliant
    // inverters: a power reduction settles well inside a second).
    let mut t = start + 1000;
    let last = system.step(t, 1.0, Some(0.0));
    assert_eq!(last.ac_w, 0.0);
    assert!(last.available_ac_w > 1500.0, "still available while curtailed");
    // Released: back up at the default ramp, 10 % of rating per second.
    for i in 1..=3 {
        t += 1000;
        let up = system.step(t, 1.0, None);
        let ceiling = rated * 0.1 * f64::from(i);
        assert!((up.ac_w - up.available_ac_w.min(ceiling)).abs() < 1e-6, "second {i}: {up:?}");
    }

    // ramp: 0 → instant.
    let mut cfg = small_roof();
    cfg.inverter = serde_saphyr::from_str("ramp: 0").unwrap();
    let mut instant = cfg.build(&munich(), &weather(WeatherKind::Clear), 1).unwrap();
    assert!(instant.step(start, 1.0, None).ac_w > 1500.0);
    let limited = instant.step(start + 1000, 1.0, Some(500.0));
    assert!((limited.ac_w - 500.0).abs() < 1e-9, "{limited:?}");
}

#[test]
fn a_shaded_module_drags_the_string_more_than_module_level_inverters() {
    let yaml = "arrays:\n  - name: roof\n    tilt: 30°\n    azimuth: 180°\n    strings:\n      - { modules: 10, module_power: 400Wp }\n\
                shading:\n  - { array: roof, string: 1, module: 2, from: \"10:00\", until: \"15:00\", blocked: 60% }\n  \
                - { array: roof, string: 1, module: 3, from: \"10:00\", until: \"15:00\", blocked: 60% }\n  \
                - { array: roof, string: 1, module: 4, from: \"10:00\", until: \"15:00\", blocked: 60% }\n";
    let shaded: SolarConfig = serde_saphyr::from_str(yaml).unwrap();
    let gap = layout_gap(&shaded, &munich(), &weather(WeatherKind::Clear), 1, spring_day(), 60.0).unwrap();
    assert!(gap.gap_kwh > 0.0 && gap.gap_percent > 3.0, "{gap:?}");

    let mut open = shaded.clone();
    open.shading.clear();
    let none = layout_gap(&open, &munich(), &weather(WeatherKind::Clear), 1, spring_day(), 60.0).unwrap();
    assert!(none.gap_kwh.abs() < 1e-9, "no shade, no gap: {none:?}");
    assert!(gap.module_kwh < none.module_kwh && gap.string_kwh < none.string_kwh);
}

#[test]
fn solar_config_reads_every_documented_key_and_rejects_unknown_ones() {
    let yaml = r#"
arrays:
  - name: east
    tilt: 25°
    azimuth: 90
    temp_coefficient: -0.37%/K
    cell_temperature: { u0: 26, u1: 6.0 }
    strings:
      - { modules: 8, module_power: 410Wp }
      - { modules: 7, module_power: 0.41kWp }
  - name: west
    tilt: 25
    azimuth: 270°
    strings: [{ modules: 6, module_power: 410 }]
inverter: { layout: string, rated_ac: 6kW, efficiency: 96%, ramp: 400W/s }
losses: 12%
albedo: 0.2
sky_diffuse: isotropic
clear_sky: haurwitz
delta_t: 69s
knot_interval: 2min
shading:
  - { array: east, string: 2, module: 7, from: "07:30", until: "09:15", blocked: 80% }
"#;
    let cfg: SolarConfig = serde_saphyr::from_str(yaml).unwrap();
    assert_eq!(cfg.module_count(), 21);
    assert!((cfg.nameplate_w() - 21.0 * 410.0).abs() < 1e-9);
    assert!((cfg.arrays[0].temp_coefficient + 0.0037).abs() < 1e-12);
    assert_eq!(cfg.rated_ac_w(), 6000.0);
    assert_eq!(cfg.ramp_w_per_s(), 400.0);
    assert_eq!(cfg.knot_interval, 120.0);
    let mut system = cfg.build(&munich(), &weather(WeatherKind::Mixed), 3).unwrap();
    let kwh = simulate_day(&mut system, spring_day(), 30.0, |_, _| {}).ac_kwh;
    assert!(kwh > 5.0, "{kwh}");

    let typo = yaml.replace("albedo", "albedoo");
    let err = serde_saphyr::from_str::<SolarConfig>(&typo).unwrap_err().to_string();
    assert!(err.contains("albedoo"), "{err}");

    let mut bad = cfg.clone();
    bad.shading[0].module = 8;
    let err = bad.build(&munich(), &WeatherConfig::default(), 0).unwrap_err().to_string();
    assert!(err.contains("modules 1 to 7, not 8"), "{err}");
    let mut bad_tz = munich();
    bad_tz.timezone = "Mars/Olympus".into();
    let err = cfg.build(&bad_tz, &WeatherConfig::default(), 0).unwrap_err().to_string();
    assert!(err.contains("unknown time zone"), "{err}");
}

#[test]
fn weather_config_reads_its_keys() {
    let w: WeatherConfig = serde_saphyr::from_str(
        "sky: varied\nlinke_turbidity: 3.5\nair_temp: 18°C\nair_temp_swing: 8°C\nwind: 2m/s\ngustiness: 0.2\n\
         measured: { path: x.csv, max_gap: 30min }\n",
    )
    .unwrap();
    assert_eq!(w.sky, WeatherKind::Varied);
    assert_eq!(w.measured.as_ref().map(|m| m.max_gap), Some(1800.0));
    assert!(serde_saphyr::from_str::<WeatherConfig>("skies: clear\n").is_err());
}

fn write_temp(name: &str, text: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(format!("spillway-solar-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

#[test]
fn measured_ghi_replaces_the_clouds_and_bad_rows_are_reported() {
    // Local times in the site's zone; one bad row, one 40-minute gap.
    let mut csv = String::from("time,ghi_w_m2\n");
    for minute in 0..=240 {
        if (100..140).contains(&minute) {
            continue;
        }
        let (h, m) = (10 + minute / 60, minute % 60);
        csv.push_str(&format!("2025-04-15 {h:02}:{m:02},{}\n", 400 + minute));
    }
    csv.push_str("2025-04-15 14:01,n/a\n");
    let path = write_temp("ghi.csv", &csv);
    let w = WeatherConfig {
        measured: Some(MeasuredConfig { path: path.clone(), max_gap: 900.0 }),
        ..WeatherConfig::default()
    };
    let mut system = small_roof().build(&munich(), &w, 0).unwrap();
    let notices: Vec<String> = system.notices().iter().map(ToString::to_string).collect();
    assert!(notices.iter().any(|n| n.starts_with("line 203: ") && n.contains("n/a")), "{notices:?}");
    assert!(notices.iter().any(|n| n.contains("gap of 41 min")), "{notices:?}");
    // 11:00 local = 09:00 UTC; measured 460 W/m² there.
    let s = system.step(1_744_707_600_000, 1.0, None);
    assert!((s.ghi_w_m2 - 460.0).abs() < 1e-9, "{s:?}");
    assert!(s.ac_w > 0.0 && s.poa_w_m2 > 0.0);
    // Inside the gap: interpolated between 11:39 (499) and 12:20 (540).
    let g = system.step(1_744_711_200_000, 1.0, None);
    assert!(g.ghi_w_m2 > 499.0 && g.ghi_w_m2 < 540.0, "{g:?}");
    std::fs::remove_file(path).ok();
}

#[test]
fn measured_pv_ac_is_replayed_under_the_limit() {
    let path = write_temp("ac.csv", "time,pv_ac_w\n2025-04-15T10:00:00Z,1000\n2025-04-15T10:10:00Z,2000\n");
    let w = WeatherConfig {
        measured: Some(MeasuredConfig { path: path.clone(), max_gap: 900.0 }),
        ..WeatherConfig::default()
    };
    let mut system = small_roof().build(&munich(), &w, 0).unwrap();
    assert!(system.notices().is_empty());
    let t = 1_744_711_500_000; // 10:05Z
    let s = system.step(t, 1.0, None);
    assert!((s.ac_w - 1500.0).abs() < 1e-9, "{s:?}");
    let limited = system.step(t + 1000, 20.0, Some(300.0));
    assert!((limited.ac_w - 300.0).abs() < 1e-9 && limited.available_ac_w > 1500.0, "{limited:?}");
    std::fs::remove_file(path).ok();
}

#[test]
fn the_plants_batched_ac_path_gives_the_samples_of_stepping_one_at_a_time() {
    // `step_ac` computes a knot interval's steps ahead in one loop; whatever the caller
    // does (steady 1 s steps, a jump in time, a change of step length, a switch to
    // `step`, a limit, dusk, a night and dawn), its powers must be bit-for-bit those of
    // `step` alone.
    let cfg = small_roof();
    let w = weather(WeatherKind::Mixed);
    let start = 1_744_700_000_000_i64; // 2025-04-15, morning in Munich
    let mut times: Vec<(i64, f64)> = Vec::new();
    let mut t = start;
    for i in 0..25_000 {
        let dt = match i {
            5_000..=5_100 => 0.5,
            7_000..=7_010 => 7.0,
            _ => 1.0,
        };
        match i {
            9_000 => t += 3_600_000,         // a jump of an hour
            15_000 => t = 1_744_738_800_000, // 17:40 UTC: through sunset into the night
            19_000 => t = 1_744_774_200_000, // 03:30 UTC the next day: night, then dawn
            _ => {}
        }
        times.push((t, dt));
        t += (dt * 1000.0) as i64;
    }
    let limit = |i: usize| if (12_000..12_500).contains(&i) { Some(400.0) } else { None };
    let mut plain = cfg.build(&munich(), &w, 11).unwrap();
    let mut batched = cfg.build(&munich(), &w, 11).unwrap();
    for (i, &(t, dt)) in times.iter().enumerate() {
        let want = plain.step(t, dt, limit(i));
        // Every 997th step goes through `step` on the batched system too.
        let (ac, available) = if i % 997 == 0 {
            let s = batched.step(t, dt, limit(i));
            (s.ac_w, s.available_ac_w)
        } else {
            let a = batched.step_ac(t, dt, limit(i));
            (a.ac_w, a.available_ac_w)
        };
        assert_eq!(ac.to_bits(), want.ac_w.to_bits(), "step {i} at {t}: {ac} vs {}", want.ac_w);
        assert_eq!(available.to_bits(), want.available_ac_w.to_bits(), "step {i}");
    }
}
