//! The real `spillway run` binary as a child process against the test plant on
//! loopback: it switches a load on, and on SIGTERM writes the safe states (relay open,
//! inverter at its safe limit) before it exits with status 0. Real time: the child has
//! its own clock; waits are bounded and nothing asserts on how long they took.

mod daemon_support;
mod support;

use std::process::Stdio;
use std::time::Duration;

use daemon_support::{LOADS, Plant, plant_until};
use tokio::io::AsyncReadExt;

/// Starts `spillway ARGS` as a child with its stderr collected; returns the child, its
/// process id and the log (complete once the child has exited).
fn spawn_logged(
    args: &[std::ffi::OsString],
    env: &[(String, String)],
) -> (tokio::process::Child, u32, tokio::task::JoinHandle<String>) {
    let mut child = tokio::process::Command::new(env!("CARGO_BIN_EXE_spillway"))
        .args(args)
        .envs(env.iter().cloned())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .kill_on_drop(true)
        .spawn()
        .unwrap();
    let pid = child.id().unwrap();
    let mut stderr = child.stderr.take().unwrap();
    let log = tokio::spawn(async move {
        let mut s = String::new();
        let _ = stderr.read_to_string(&mut s).await;
        s
    });
    (child, pid, log)
}

#[cfg(unix)]
#[tokio::test]
async fn sigterm_writes_the_safe_states_before_the_process_exits() {
    let plant = Plant::start(4200.0).await;
    let yaml = plant
        .site_yaml(LOADS, "")
        .replace("poll: 1s", "poll: 200ms")
        .replace("  import_target: 40W", "  import_target: 40W\n  tick: 200ms")
        .replace("for 5s", "for 1s");
    let dir = std::env::temp_dir().join(format!("spillway-sigterm-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let site = dir.join("bench.yaml");
    std::fs::write(&site, yaml).unwrap();

    let (mut child, pid, log) =
        spawn_logged(&["run".into(), site.clone().into()], &[("RUST_LOG".to_owned(), "info".to_owned())]);

    plant_until(&plant, Duration::from_secs(30), "a load switched on by the child", |s| s.heater || s.pump).await;
    let status = std::process::Command::new("kill").args(["-TERM", &pid.to_string()]).status().unwrap();
    assert!(status.success());
    let exit = tokio::time::timeout(Duration::from_secs(20), child.wait()).await.expect("the child exits").unwrap();
    let log = log.await.unwrap();
    assert!(exit.success(), "exit status {exit:?}\n{log}");
    assert_eq!(plant.devices.coil(3, 0), Some(false), "heater relay open\n{log}");
    assert_eq!(plant.devices.coil(3, 1), Some(false), "pump relay open\n{log}");
    assert_eq!(plant.devices.holding(2, 10), Some(0), "inverter at its safe limit (0 W)\n{log}");
    assert!(log.contains("SAFETY") && log.contains("licensed electrician"), "the banner\n{log}");
    assert!(log.contains("SIGTERM received") && log.contains("safe states handed to the links"), "{log}");
    assert!(log.contains("safe state written at shutdown device=relays"), "the relay module says it took them\n{log}");
    // The last line sums the run up for whoever watched it.
    let last = log.lines().rev().find(|l| l.contains(" stopped ")).unwrap_or_default();
    assert!(
        last.contains("failsafe_entries=") && last.contains("export_over_limit_s=") && last.contains("import_kwh="),
        "{last}"
    );
    let state = dir.join("bench.state.json");
    assert!(state.exists(), "counters saved next to the site file");
    let _ = std::fs::remove_dir_all(&dir);
}

/// The same against the plant simulator served in-process (real time): the child
/// curtails the inverter, and SIGTERM leaves the simulated relays open and the limit at
/// the site's safe value.
#[cfg(unix)]
#[tokio::test]
async fn sigterm_against_the_simulator_leaves_its_relays_open_and_its_limit_safe() {
    let sim = daemon_support::sim::Sim::start(4200.0).await;
    let (dir, site) = sim.write_site("sigterm-sim", "house");
    let args = ["run".into(), site.clone().into_os_string(), "--state".into(), dir.join("house.state.json").into()];
    let (mut child, pid, log) = spawn_logged(&args, &[]);
    let deadline = std::time::Instant::now() + Duration::from_secs(30);
    while !sim.limit_w().is_some_and(|l| l > 0.0 && l < 4000.0) {
        assert!(std::time::Instant::now() < deadline, "the child never curtailed: {:?}", sim.limit_w());
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let status = std::process::Command::new("kill").args(["-TERM", &pid.to_string()]).status().unwrap();
    assert!(status.success());
    let exit = tokio::time::timeout(Duration::from_secs(20), child.wait()).await.expect("the child exits").unwrap();
    assert!(exit.success(), "{exit:?}\n{}", log.await.unwrap());
    assert_eq!(sim.relays(), vec![false, false]);
    assert_eq!(sim.limit_w(), Some(0.0), "the site's safe limit is 0 W");
    assert!(dir.join("house.state.json").exists());
    sim.handle.stop().await;
    let _ = std::fs::remove_dir_all(&dir);
}

/// The systemd unit shipped in `config/systemd/`: its `ExecStart` command line, run as
/// the unit runs it (paths moved to a temporary directory), controls the test plant;
/// its `KillSignal` stops it with the safe states written and the state file where
/// `StateDirectory` keeps it, within `TimeoutStopSec`; and a site file that does not
/// check exits with a status the unit does not restart on.
#[cfg(unix)]
#[tokio::test]
async fn the_shipped_systemd_unit_runs_and_stops_the_controller() {
    let unit_path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/systemd/spillway.service");
    let unit = std::fs::read_to_string(&unit_path).unwrap();
    let key = |k: &str| -> Vec<String> {
        unit.lines().filter_map(|l| l.trim().strip_prefix(&format!("{k}=")).map(str::to_owned)).collect()
    };
    let one = |k: &str| key(k).pop().unwrap_or_else(|| panic!("the unit sets {k}"));
    let state_dir = format!("/var/lib/{}", one("StateDirectory"));
    assert_eq!(one("KillSignal"), "SIGTERM");
    assert_eq!(one("Restart"), "on-failure");
    // Serial sites: the user can open the adapters, the comments say how to name
    // them stably; no watchdog, since the daemon does not notify systemd.
    assert!(key("SupplementaryGroups").iter().any(|g| g.split_whitespace().any(|g| g == "dialout")));
    assert!(unit.contains("/dev/serial/by-id/"), "the unit's comments advise stable serial paths");
    assert!(key("WatchdogSec").is_empty() && one("Type") == "exec", "a watchdog needs sd_notify");
    let no_restart: Vec<i32> = one("RestartPreventExitStatus").split_whitespace().map(|c| c.parse().unwrap()).collect();
    let stop_within = Duration::from_secs(one("TimeoutStopSec").parse().unwrap());

    let plant = Plant::start(4200.0).await;
    let dir = std::env::temp_dir().join(format!("spillway-unit-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    // Named unlike the state file, so that a state file beside it would not pass.
    let site = dir.join("house.yaml");
    std::fs::write(&site, plant.site_yaml(LOADS, "").replace("for 5s", "for 1s")).unwrap();
    let exec = one("ExecStart");
    let mut words = exec.split_whitespace();
    assert_eq!(words.next(), Some("/usr/local/bin/spillway"));
    let args: Vec<String> = words
        .map(|w| match w {
            "/etc/spillway/site.yaml" => site.display().to_string(),
            w if w.starts_with(&format!("{state_dir}/")) => dir.join(&w[state_dir.len() + 1..]).display().to_string(),
            w => {
                assert!(!w.starts_with('/'), "a path the test does not map: {w}");
                w.to_owned()
            }
        })
        .collect();
    let env: Vec<(String, String)> = key("Environment")
        .iter()
        .map(|e| e.split_once('=').map(|(k, v)| (k.to_owned(), v.to_owned())).unwrap())
        .collect();

    let os_args: Vec<std::ffi::OsString> = args.iter().map(Into::into).collect();
    let (mut child, pid, log) = spawn_logged(&os_args, &env);
    plant_until(&plant, Duration::from_secs(30), "a load switched on under the unit's command line", |s| {
        s.heater || s.pump
    })
    .await;
    assert!(std::process::Command::new("kill").args(["-TERM", &pid.to_string()]).status().unwrap().success());
    let exit = tokio::time::timeout(stop_within, child.wait()).await.expect("stops within TimeoutStopSec").unwrap();
    let log = log.await.unwrap();
    assert!(exit.success(), "exit status {exit:?}\n{log}");
    assert_eq!(plant.devices.coil(3, 0), Some(false), "heater relay open\n{log}");
    assert_eq!(plant.devices.holding(2, 10), Some(0), "inverter at its safe limit\n{log}");
    assert!(dir.join("site.state.json").exists(), "counters saved in the state directory\n{log}");
    assert!(!dir.join("house.state.json").exists(), "not beside the site file");

    // A site file that does not check: the exit status is one the unit does not restart on.
    std::fs::write(&site, "site: { name: Broken }\n").unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_spillway")).args(&args).envs(env).output().unwrap();
    let code = out.status.code().unwrap();
    assert!(
        no_restart.contains(&code),
        "exit {code} is restarted by the unit\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let _ = std::fs::remove_dir_all(&dir);
}

/// One controller per site: while `spillway run` drives the test plant, a second `run`
/// and a `step-test` on the same site file are refused before they connect to anything
/// (exit 2, saying what holds the site); once it has stopped, the step test runs.
#[cfg(unix)]
#[tokio::test]
async fn a_second_controller_on_the_same_site_file_is_refused() {
    let plant = Plant::start(4200.0).await;
    let dir = std::env::temp_dir().join(format!("spillway-one-controller-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let site = dir.join("house.yaml");
    std::fs::write(&site, plant.site_yaml(LOADS, "").replace("for 5s", "for 1s")).unwrap();
    let mut child = tokio::process::Command::new(env!("CARGO_BIN_EXE_spillway"))
        .arg("run")
        .arg(&site)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .kill_on_drop(true)
        .spawn()
        .unwrap();
    let pid = child.id().unwrap();
    plant_until(&plant, Duration::from_secs(30), "the first controller switched a load on", |s| s.heater || s.pump)
        .await;
    let _before = plant.history().len();

    let second = |args: &[&str]| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_spillway")).args(args).output().unwrap();
        (out.status.code(), String::from_utf8_lossy(&out.stderr).into_owned())
    };
    let site_arg = site.display().to_string();
    let (code, err) = second(&["run", &site_arg]);
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("another Spillway command is driving this site") && err.contains("`run` does not start"),
        "{err}"
    );
    let (code, err) =
        second(&["step-test", &site_arg, "--load", "water_heater", "--hold", "1s", "--settle", "1s", "--yes"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("`step-test` does not start"), "{err}");
    assert!(std::process::Command::new("kill").args(["-TERM", &pid.to_string()]).status().unwrap().success());
    let exit = tokio::time::timeout(Duration::from_secs(20), child.wait()).await.expect("the child exits").unwrap();
    assert!(exit.success());
    // Released with its holder: a step test now gets past the lock.
    let (_, err) =
        second(&["step-test", &site_arg, "--load", "water_heater", "--hold", "1s", "--settle", "1s", "--yes"]);
    assert!(!err.contains("another Spillway command"), "{err}");
    let _ = std::fs::remove_dir_all(&dir);
}
