//! `spillway demo`: the built-in site against the in-process simulator over loopback
//! Modbus TCP. The controller is seen working within the first seconds, and when it
//! stops (by itself, or on Ctrl-C) the simulated relays are open and the inverter is at
//! its safe limit. Real time, bounded; no assertion on durations.

use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use spillway::daemon::demo::{self, DemoOptions, Frame, WeatherKind};

#[test]
fn the_demo_shows_the_controller_at_work_and_stops_in_safe_states() {
    let mut frames: Vec<Frame> = Vec::new();
    let options = DemoOptions { speed: 10.0, run_for: Some(Duration::from_secs(12)), ..DemoOptions::default() };
    let summary = demo::run(options, |f| frames.push(f.clone())).unwrap();
    assert!(frames.len() >= 10, "a frame a second: {}", frames.len());
    // Within the first five seconds the rules are in charge and the guard holds the
    // meter on the import side of zero.
    let early = &frames[..5];
    assert!(
        early.iter().any(|f| f.status.mode == "normal"),
        "{:?}",
        early.iter().map(|f| &f.status.mode).collect::<Vec<_>>()
    );
    assert!(
        early.iter().any(|f| f.status.inverter.as_ref().is_some_and(|i| i.reason == "export_guard")),
        "the export guard acts early"
    );
    // The water heater takes the surplus (start rule held 20 s of simulated time).
    let heater_on = frames.iter().position(|f| f.status.loads[0].on);
    println!("water heater on at frame {heater_on:?} of {}", frames.len());
    assert!(heater_on.is_some(), "the heater never started");
    assert!(summary.switchings >= 1);
    let last = frames.last().unwrap();
    assert!(last.last);
    assert_eq!(last.status.mode, "stopped");
    assert!(last.plant.relays.iter().all(|(_, closed)| !closed), "{:?}", last.plant.relays);
    assert_eq!(last.plant.limit_w, Some(0.0));
}

/// The simulated inverter applies the limit the engine decided, also at high speed
/// under clouds, where the limit may sit still for a while: its revert timer counts
/// simulated seconds, so the limit must not lapse between two refreshes.
#[test]
fn the_simulated_inverter_keeps_the_engines_limit_at_twenty_times_speed() {
    let mut frames: Vec<Frame> = Vec::new();
    let options = DemoOptions {
        speed: 20.0,
        sky: Some(WeatherKind::Mixed),
        run_for: Some(Duration::from_secs(15)),
        ..DemoOptions::default()
    };
    demo::run(options, |f| frames.push(f.clone())).unwrap();
    // A frame may catch a change in transit; the first seconds are start-up.
    let disagree: Vec<(Option<f64>, Option<f64>)> = frames[3..frames.len() - 1]
        .iter()
        .map(|f| (f.status.inverter.as_ref().and_then(|i| i.limit_w), f.plant.limit_w))
        .filter(|(engine, plant)| match (engine, plant) {
            (Some(e), Some(p)) => (e - p).abs() > 100.0,
            (None, None) => false,
            (None, Some(p)) => *p < 5900.0,
            (Some(_), None) => true,
        })
        .collect();
    assert!(disagree.len() <= 2, "engine limit vs the inverter's: {disagree:?}");
}

fn demo_child(args: &[&str]) -> std::process::Child {
    Command::new(env!("CARGO_BIN_EXE_spillway"))
        .arg("demo")
        .args(args)
        .env_remove("RUST_LOG")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

fn finish(child: std::process::Child) -> (bool, String) {
    let out = child.wait_with_output().unwrap();
    (out.status.success(), String::from_utf8_lossy(&out.stdout).into_owned())
}

#[test]
fn the_demo_binary_prints_frames_and_its_safe_ending() {
    let (ok, out) = finish(demo_child(&["--speed", "10", "--run-for", "4s"]));
    assert!(ok, "{out}");
    assert!(out.contains("Spillway demo · Rosemead · export forbidden"), "{out}");
    assert!(out.contains("water_heater") && out.contains("pool_pump"), "{out}");
    // The example's tank is layered: its sensor and its top are both shown.
    assert!(out.contains(" °C at its sensor, ") && out.contains(" °C at the top (what the taps get)"), "{out}");
    assert!(out.contains("safe states written: relays tank open, pump open · inverter limit 0 W"), "{out}");
    assert!(out.contains("stopped after"), "{out}");
}

#[cfg(unix)]
#[test]
fn ctrl_c_stops_the_demo_in_safe_states() {
    let child = demo_child(&["--speed", "5"]);
    let pid = child.id();
    // Let it run a couple of frames, then interrupt it as a person would.
    let t = Instant::now();
    while t.elapsed() < Duration::from_secs(3) {
        std::thread::sleep(Duration::from_millis(100));
    }
    assert!(Command::new("kill").args(["-INT", &pid.to_string()]).status().unwrap().success());
    let (ok, out) = finish(child);
    assert!(ok, "{out}");
    assert!(out.contains("STOPPED") && out.contains("safe states written: relays tank open, pump open"), "{out}");
}

#[test]
fn a_speed_out_of_range_is_refused() {
    let err = demo::run(DemoOptions { speed: 500.0, ..DemoOptions::default() }, |_| {}).unwrap_err();
    assert!(err.to_string().contains("--speed must be between 1 and 60"), "{err}");
}
