//! The `spillway-sim` commands of the solar chain, run as a user would.

use std::process::Command;

fn run(args: &[&str]) -> (bool, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_spillway-sim")).args(args).output().unwrap();
    (out.status.success(), String::from_utf8(out.stdout).unwrap(), String::from_utf8(out.stderr).unwrap())
}

#[test]
fn sun_prints_the_spa_worked_example() {
    // Source: Reda & Andreas, NREL/TP-560-34302 (rev. 2008), Table A5.1: zenith 50.11162°,
    // azimuth 194.34024°.
    let (ok, stdout, stderr) = run(&[
        "sun",
        "--lat",
        "39.742476",
        "--lon",
        "-105.1786",
        "--at",
        "2003-10-17T12:30:30-07:00",
        "--elevation",
        "1830.14",
        "--pressure",
        "820",
        "--temperature",
        "11",
        "--delta-t",
        "67",
    ]);
    assert!(ok, "{stderr}");
    let v: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    assert!((v["zenith_deg"].as_f64().unwrap() - 50.111_62).abs() < 5e-4, "{stdout}");
    assert!((v["azimuth_deg"].as_f64().unwrap() - 194.340_24).abs() < 5e-4, "{stdout}");
}

#[test]
fn pv_day_prints_totals_or_a_series() {
    let base = [
        "pv-day",
        "--lat",
        "-33.9249",
        "--lon",
        "18.4241",
        "--altitude",
        "20",
        "--tz",
        "Africa/Johannesburg",
        "--date",
        "2025-12-21",
        "--tilt",
        "20",
        "--azimuth",
        "0",
        "--kwp",
        "4",
        "--air-temp",
        "24",
        "--wind",
        "5",
    ];
    let (ok, stdout, stderr) = run(&base);
    assert!(ok, "{stderr}");
    let v: serde_json::Value = serde_json::from_str(&stdout).unwrap();
    // Source: pvlib 0.16.1, tests/reference/sites.json, site "capetown-summer": 30.929 kWh AC.
    let ac = v["ac_kwh"].as_f64().unwrap();
    assert!((ac - 30.929).abs() / 30.929 < 0.005, "{stdout}");
    for key in ["ghi_kwh_m2", "poa_kwh_m2", "dc_kwh", "peak_ac_w"] {
        assert!(v[key].as_f64().unwrap() > 0.0, "{key} in {stdout}");
    }

    let mut csv_args = base.to_vec();
    csv_args.extend(["--csv", "--step", "5min"]);
    let (ok, stdout, stderr) = run(&csv_args);
    assert!(ok, "{stderr}");
    let lines: Vec<&str> = stdout.lines().collect();
    assert_eq!(lines[0], "time,ghi_w_m2,poa_w_m2,cell_temp_c,dc_w,ac_w");
    assert_eq!(lines.len(), 1 + 288, "one row per 5 minutes of the day");
    assert!(lines[1].starts_with("2025-12-21T00:00:00+02:00,"), "{}", lines[1]);
}

#[test]
fn errors_say_what_to_fix() {
    let (ok, _, stderr) = run(&["sun", "--lat", "40", "--lon", "10", "--at", "noon"]);
    assert!(!ok);
    assert!(stderr.contains("RFC 3339"), "{stderr}");
    let (ok, _, stderr) = run(&[
        "pv-day",
        "--lat",
        "40",
        "--lon",
        "10",
        "--altitude",
        "0",
        "--tz",
        "Nowhere/Special",
        "--date",
        "2025-06-01",
        "--tilt",
        "30",
        "--azimuth",
        "180",
        "--kwp",
        "3",
    ]);
    assert!(!ok);
    assert!(stderr.contains("unknown time zone `Nowhere/Special`"), "{stderr}");
    let (ok, stdout, _) = run(&["--help"]);
    assert!(ok && stdout.contains("sun") && stdout.contains("pv-day"), "{stdout}");
}
