//! The commissioning verbs as an installer runs them: `spillway read` prints every
//! point raw and decoded, `spillway step-test` switches a load on and off and measures
//! the step at the meter, `spillway failsafe-test` times the safe state while the
//! meter's link is down; they say clearly when a device does not answer. The binary
//! runs as a child process against the test plant on loopback (real time; bounded).

mod daemon_support;
mod support;

use std::time::Duration;

use daemon_support::{BATTERY_REGISTER, LOADS, Plant};
use tokio::process::Command;
use tokio_modbus::ExceptionCode;

/// Runs `spillway failsafe-test` with `args`, silencing the plant's meter when it says
/// DISCONNECT and giving it back at RECONNECT, as the installer would pull and replug
/// the cable; its exit status and what it printed.
async fn failsafe_test(plant: &Plant, args: &[&str]) -> (std::process::ExitStatus, String) {
    use tokio::io::{AsyncBufReadExt, BufReader};
    let mut child = Command::new(env!("CARGO_BIN_EXE_spillway"))
        .args(args)
        .env_remove("RUST_LOG")
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::null())
        .kill_on_drop(true)
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    let mut out = String::new();
    let run = async {
        while let Some(line) = lines.next_line().await.unwrap() {
            if line.starts_with("DISCONNECT") {
                plant.meter.set_silent(true);
            } else if line.contains("RECONNECT") {
                plant.meter.set_silent(false);
            }
            out.push_str(&line);
            out.push('\n');
        }
        child.wait().await.unwrap()
    };
    let status = tokio::time::timeout(Duration::from_secs(120), run).await.expect("the test ends");
    println!("{out}");
    (status, out)
}

async fn spillway(args: &[&str]) -> (i32, String, String) {
    let out = tokio::time::timeout(
        Duration::from_secs(60),
        Command::new(env!("CARGO_BIN_EXE_spillway")).args(args).env_remove("RUST_LOG").output(),
    )
    .await
    .expect("the command ends")
    .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn write_site(plant: &Plant, tag: &str) -> (std::path::PathBuf, String) {
    let dir = std::env::temp_dir().join(format!("spillway-commission-{tag}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("bench.yaml");
    // A scaled register too: the tank sensor in 0.1 °C on the relay module's inputs.
    let yaml = plant.site_yaml(LOADS, "").replace(
        "\ninverter:",
        "\n  tank_temp: { device: relays, register: 5, table: input, type: i16, scale: 0.1, unit: °C }\ninverter:",
    );
    std::fs::write(&path, yaml).unwrap();
    let p = path.display().to_string();
    (path, p)
}

#[tokio::test]
async fn read_prints_every_point_raw_and_decoded_and_names_the_failures() {
    let plant = Plant::start(1800.0).await;
    plant.devices.set_input(3, 5, &[(-52i16) as u16]);
    let (path, site) = write_site(&plant, "read");
    tokio::time::sleep(Duration::from_millis(300)).await; // a plant step or two

    let (code, out, err) = spillway(&["read", &site]).await;
    assert_eq!(code, 0, "{out}\n{err}");
    let line = |name: &str| out.lines().find(|l| l.trim_start().starts_with(name)).unwrap_or("").to_owned();
    assert!(line("grid").contains("holding 0 ×1") && line("grid").contains("[0xFA88]"), "{out}"); // −1400 W
    assert!(line("grid").contains("-1.4 kW") || line("grid").ends_with("-1400 W"), "{out}");
    assert!(line("pv ").contains("1800 W") || line("pv ").contains("1.8 kW"), "{out}");
    assert!(line("tank_temp").contains("[0xFFCC]") && line("tank_temp").contains("-5.2 °C"), "{out}");

    // The same readings into the commissioning record.
    let record = path.with_file_name("record.md");
    let record_arg = record.display().to_string();
    let (code, out, err) = spillway(&["read", &site, "--record", &record_arg]).await;
    assert_eq!(code, 0, "{out}\n{err}");
    let text = std::fs::read_to_string(&record).unwrap();
    assert!(text.starts_with("# Commissioning record: Bench") && text.contains("## Readings ("), "{text}");
    assert!(text.contains("-5.2 °C") && text.contains("- result: **PASS**"), "{text}");
    assert!(!out.contains("sign looks reversed"), "export with the sun out is no sign of anything: {out}");

    // At night (no PV) a meter read the wrong way round shows the house's import as
    // export: a note says so, without failing the read.
    plant.set_pv(0.0);
    tokio::time::sleep(Duration::from_millis(300)).await;
    let right = std::fs::read_to_string(&path).unwrap();
    let grid = "grid: { device: meter, register: 0, type: i16, unit: W }";
    assert!(right.contains(grid), "{right}");
    std::fs::write(&path, right.replace(grid, "grid: { device: meter, register: 0, type: i16, unit: W, scale: -1 }"))
        .unwrap();
    let (code, out, err) = spillway(&["read", &site]).await;
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("note: the grid reads -400 W (export) while the PV gives 0 W"), "{out}");
    assert!(out.contains("the meter's sign looks reversed"), "{out}");
    std::fs::write(&path, right).unwrap();

    // One device: only its points. A refused register: named with its exception.
    plant.devices.with(|s| {
        s.exceptions.insert((4, 5), ExceptionCode::IllegalDataAddress);
    });
    let (code, out, _) = spillway(&["read", &site, "--device", "relays"]).await;
    assert_eq!(code, 1, "{out}");
    assert!(!out.contains("grid"), "{out}");
    assert!(line_of(&out, "tank_temp").contains("exception IllegalDataAddress"), "{out}");

    // A device that takes the connection and says nothing (a wrong unit id behind a
    // gateway, often): the unit id is the first thing named.
    plant.meter.set_silent(true);
    let (code, out, _) = spillway(&["read", &site, "--device", "meter"]).await;
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("no answer within 500 ms: check the device's `unit` id"), "{out}");
    plant.meter.set_silent(false);

    // A device that does not answer at all.
    drop(plant);
    tokio::time::sleep(Duration::from_millis(200)).await;
    let (code, out, _) = spillway(&["read", &site, "--device", "meter"]).await;
    assert_eq!(code, 1);
    assert!(out.contains("meter: cannot connect to 127.0.0.1:"), "{out}");
    let (code, _, err) = spillway(&["read", &site, "--device", "nope"]).await;
    assert_eq!(code, 2, "an unknown device is a bad flag value");
    assert!(err.contains("no device \"nope\"") && err.contains("meter, inverter, relays"), "{err}");
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

fn line_of(out: &str, name: &str) -> String {
    out.lines().find(|l| l.trim_start().starts_with(name)).unwrap_or("").to_owned()
}

#[tokio::test]
async fn step_test_switches_the_load_measures_the_step_and_switches_it_off() {
    let plant = Plant::start(0.0).await;
    let (path, site) = write_site(&plant, "step");
    let (code, out, err) =
        spillway(&["step-test", &site, "--load", "water_heater", "--hold", "3s", "--settle", "2s", "--yes"]).await;
    println!("{out}");
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("water_heater: ON") && out.contains("water_heater: OFF"), "{out}");
    assert!(out.contains("step +3000 W against 3 kW rated: the relay switches this load"), "{out}");
    assert_eq!(plant.devices.coil(3, 0), Some(false), "off again");
    assert_eq!(plant.devices.coil(3, 1), Some(false), "the pump was never touched");
    assert_eq!(plant.devices.holding(2, 10), Some(5000), "nor the inverter limit");
    let on: Vec<_> = plant.history().into_iter().filter(|s| s.heater).collect();
    assert!(!on.is_empty(), "the heater really ran");

    // The wrong relay: the pump's test sees a 1.1 kW step, the heater's rating expects 3 kW.
    let wrong = std::fs::read_to_string(&path).unwrap().replace("coil: 0 }", "coil: 1 }");
    std::fs::write(&path, wrong).unwrap();
    let (code, out, _) =
        spillway(&["step-test", &site, "--load", "water_heater", "--hold", "3s", "--settle", "2s", "--yes"]).await;
    println!("{out}");
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("step +1100 W against 3 kW rated: check that relays coil 1 feeds water_heater"), "{out}");

    // A meter read the wrong way round (export positive): the step goes the other way,
    // and the message names the sign, not the wiring.
    let right = std::fs::read_to_string(&path).unwrap().replace("coil: 1 }", "coil: 0 }");
    let grid = "grid: { device: meter, register: 0, type: i16, unit: W }";
    assert!(right.contains(grid), "{right}");
    std::fs::write(&path, right.replace(grid, "grid: { device: meter, register: 0, type: i16, unit: W, scale: -1 }"))
        .unwrap();
    let (code, out, _) =
        spillway(&["step-test", &site, "--load", "water_heater", "--hold", "3s", "--settle", "2s", "--yes"]).await;
    println!("{out}");
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("step -3000 W against 3 kW rated: the grid reading fell"), "{out}");
    assert!(out.contains("the meter's sign looks reversed") && out.contains("`scale: -1`"), "{out}");
    std::fs::write(&path, std::fs::read_to_string(&path).unwrap().replace(", scale: -1 }", " }")).unwrap();

    // In the sun, with no controller to hold the limit, the site exports around the
    // test: it passes, and says so.
    plant.set_pv(4500.0);
    tokio::time::sleep(Duration::from_millis(300)).await;
    let (code, out, _) =
        spillway(&["step-test", &site, "--load", "water_heater", "--hold", "3s", "--settle", "2s", "--yes"]).await;
    println!("{out}");
    assert_eq!(code, 0, "{out}");
    assert!(out.contains("note: the site exported up to 4.1 kW around the test (export limit 0 W)"), "{out}");
    plant.set_pv(0.0);

    // Without --yes and no terminal to ask on, nothing is switched.
    let (code, _, err) = spillway(&["step-test", &site, "--load", "water_heater"]).await;
    assert_eq!(code, 1);
    assert!(err.contains("--yes"), "{err}");

    // A meter that does not answer.
    plant.meter.set_silent(true);
    let (code, _, err) =
        spillway(&["step-test", &site, "--load", "water_heater", "--hold", "1s", "--settle", "1s", "--yes"]).await;
    assert_eq!(code, 1);
    assert!(err.contains("device \"meter\" does not answer"), "{err}");
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

/// A battery stepped both ways: charging, and with `--discharge` the other way, which
/// proves the setpoint's sign. A battery inverter that takes + as discharging is caught
/// (the step goes the wrong way, exit 1, and the message says what to change); a
/// discharge on a load that may not, or beyond its `discharge.max`, is a bad flag.
#[tokio::test]
async fn step_test_steps_a_battery_both_ways_and_catches_a_reversed_sign() {
    let plant = Plant::start(0.0).await;
    let dir = std::env::temp_dir().join(format!("spillway-commission-battery-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("bench.yaml");
    let battery = format!(
        "{LOADS}
  - name: battery
    priority: 3
    kind: battery
    max_charge: 2kW
    soc: soc
    setpoint: {{ device: relays, register: {BATTERY_REGISTER}, type: i32 }}
    discharge: {{ max: 1kW }}
"
    );
    let yaml = plant
        .site_yaml(&battery, "")
        .replace("\ninverter:", "\n  soc: { device: relays, register: 60, unit: \"%\" }\ninverter:");
    std::fs::write(&path, yaml).unwrap();
    let site = path.display().to_string();
    let step = |extra: &'static [&'static str]| {
        let site = site.clone();
        async move {
            let mut args =
                vec!["step-test", site.as_str(), "--load", "battery", "--hold", "3s", "--settle", "2s", "--yes"];
            args.extend_from_slice(extra);
            spillway(&args).await
        }
    };

    let (code, out, err) = step(&[]).await;
    println!("{out}");
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("battery: CHARGE 2 kW") && out.contains("battery: 0 W"), "{out}");
    assert!(out.contains("step +2000 W against 2 kW asked: the setpoint drives this battery, + charging"), "{out}");
    let (code, out, err) = step(&["--discharge", "300W"]).await;
    println!("{out}");
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("told to DISCHARGE 300 W") && out.contains("step -300 W against -300 W asked"), "{out}");
    assert_eq!(plant.devices.holding(3, BATTERY_REGISTER + 1), Some(0), "back to 0 W");

    plant.reverse_battery();
    let (code, out, _) = step(&["--discharge", "300W"]).await;
    println!("{out}");
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("step +300 W against -300 W asked: the battery went the other way"), "{out}");

    let (code, _, err) = step(&["--discharge", "2kW"]).await;
    assert_eq!(code, 2);
    assert!(err.contains("at most 1 kW"), "{err}");
    let (code, _, err) =
        spillway(&["step-test", &site, "--load", "water_heater", "--discharge", "300W", "--yes"]).await;
    assert_eq!(code, 2);
    assert!(err.contains("--discharge is for a battery load"), "{err}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// `failsafe-test` as an installer runs it: the meter's link is "unplugged" when the
/// command says DISCONNECT and plugged back at RECONNECT; the timeline, the verdict and
/// the record. Real time, about half a minute (10 s of settling, the recovery hold).
#[tokio::test]
async fn failsafe_test_times_the_safe_state_and_writes_a_record() {
    let plant = Plant::start(4500.0).await;
    let (path, site) = write_site(&plant, "failsafe");
    let record = path.with_file_name("record.md");
    let step_recorded = |record: String| {
        let site = site.clone();
        async move {
            let args = ["step-test", &site, "--load", "water_heater", "--hold", "3s", "--settle", "2s", "--yes"];
            spillway(&[&args[..], &["--record", &record]].concat()).await
        }
    };
    // A record in a folder that does not exist is refused before anything is switched.
    let nowhere = path.with_file_name("no-such-folder").join("record.md").display().to_string();
    let (code, _, err) = step_recorded(nowhere).await;
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("cannot write the record"), "{err}");
    assert!(plant.history().iter().all(|s| !s.heater), "nothing was switched");
    // The installer's order: a step test of each load, then the fail-safe test, all
    // appended to one record.
    let (code, out, err) = step_recorded(record.display().to_string()).await;
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("result appended to the record"), "{out}");
    let record_arg = record.display().to_string();
    let (status, out) = failsafe_test(
        &plant,
        &["failsafe-test", &site, "--yes", "--watch", "3s", "--wait", "30s", "--record", &record_arg],
    )
    .await;
    assert_eq!(status.code(), Some(0), "{out}");
    assert!(out.contains("result: PASS"), "{out}");
    let safe = out.lines().find(|l| l.starts_with("time to the safe state:")).unwrap();
    let secs: f64 = safe.split_whitespace().nth(5).unwrap().parse().unwrap();
    assert!(secs <= 5.0, "{safe}");
    assert!(out.lines().any(|l| l.contains(" off ") && l.contains("+")), "a load that was on was switched off: {out}");
    let text = std::fs::read_to_string(&record).unwrap();
    println!("{text}");
    // The step test's section came first (below); the fail-safe test's follows it.
    assert!(text.starts_with("# Commissioning record: Bench"), "{text}");
    assert_eq!(text.matches("## The site as Spillway reads it").count(), 1, "{text}");
    let step_at = text.find("## Step test: water_heater").expect("the step test's section");
    let failsafe_at = text.find("## Fail-safe test").expect("the fail-safe test's section");
    assert!(step_at < failsafe_at, "{text}");
    assert_eq!(text.matches("- result: **PASS**").count(), 2, "{text}");
    assert_eq!(text.matches("Signature").count(), 2, "{text}");
    assert!(text[failsafe_at..].contains("time to the safe state:"), "{text}");
    let hashes: Vec<&str> = text.lines().filter_map(|l| l.split("SHA-256").nth(1)).collect();
    assert_eq!(hashes.len(), 3, "the header and each section name the site file's hash: {text}");

    // A site whose export is allowed has no fail-safe to test: refused before starting.
    let allowed = std::fs::read_to_string(&path).unwrap().replace("export: forbidden", "export: allowed");
    std::fs::write(&path, allowed).unwrap();
    let (code, _, err) = spillway(&["failsafe-test", &site, "--yes"]).await;
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("export is allowed"), "{err}");
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

/// Against the plant simulator (a SunSpec inverter with models 123 and 704): `read`
/// names the SunSpec models and says which one the limit is written to and what the
/// inverter does by itself if Spillway stops (model 704 falls back to the safe limit,
/// SunSpec model 704 `WMaxLimPctRvrt`).
#[tokio::test]
async fn read_says_which_model_takes_the_inverter_limit_and_how_it_fails() {
    let sim = daemon_support::sim::Sim::start(3000.0).await;
    let (dir, path) = sim.write_site("commission-sunspec", "site");
    let site = path.display().to_string();
    let (code, out, err) = spillway(&["read", &site, "--device", "inverter"]).await;
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("SunSpec models") && out.contains("123@") && out.contains("704@"), "{out}");
    let note = line_of(&out, "power limit:");
    assert!(note.contains("model 704") && note.contains("falls back to 0 W") && note.contains("40 s"), "{out}");
    assert!(!out.contains("warning"), "{out}");
    // Other devices carry no such line.
    let (_, out, _) = spillway(&["read", &site, "--device", "meter"]).await;
    assert!(!out.contains("power limit"), "{out}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// An unreadable site file is an error that stops the command (exit 2) for the daemon and
/// the commissioning verbs as for every other command; a site file that reads but does
/// not check is a checked problem (exit 1). A state file whose directory is missing stops
/// `run` before any device is touched (exit 2), with the advice in the message.
#[tokio::test]
async fn exit_codes_tell_an_unreadable_file_from_a_bad_one() {
    let dir = std::env::temp_dir().join(format!("spillway-exit-codes-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let missing = dir.join("no-such-site.yaml").display().to_string();
    for verb in [&["run"][..], &["read"], &["step-test", "--load", "pump", "--yes"], &["check"], &["simulate"]] {
        let mut args: Vec<&str> = verb.to_vec();
        args.insert(1, &missing);
        let (code, _, err) = spillway(&args).await;
        assert_eq!(code, 2, "{verb:?} on a missing file: {err}");
        assert!(err.contains("no-such-site.yaml"), "{verb:?} names the file: {err}");
    }
    // An unknown load is a bad flag value, like an unknown device.
    let good_site = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/zero-export-house.yaml");
    let (code, _, err) = spillway(&["step-test", &good_site.display().to_string(), "--load", "nope", "--yes"]).await;
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("no load \"nope\""), "{err}");
    let bad = dir.join("bad.yaml");
    std::fs::write(&bad, "site: { name: Bad, timezone: Europe/Lisbon }\nloads: 3\n").unwrap();
    let bad = bad.display().to_string();
    for verb in ["run", "read", "check"] {
        let (code, _, err) = spillway(&[verb, &bad]).await;
        assert_eq!(code, 1, "{verb} on an invalid file: {err}");
    }
    let good = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/zero-export-house.yaml");
    let state = dir.join("not-created/site.state.json").display().to_string();
    let (code, _, err) = spillway(&["run", &good.display().to_string(), "--state", &state]).await;
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("does not exist: create it"), "{err}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// Ctrl-C (or SIGTERM) in the middle of a step test must not leave the load switched on
/// with nobody controlling it: the load is switched off again before the command ends.
#[tokio::test]
async fn an_interrupted_step_test_switches_the_load_off_again() {
    use tokio::io::{AsyncBufReadExt, BufReader};
    let plant = Plant::start(0.0).await;
    let (path, site) = write_site(&plant, "step-interrupted");
    for signal in ["-INT", "-TERM"] {
        let mut child = Command::new(env!("CARGO_BIN_EXE_spillway"))
            .args(["step-test", &site, "--load", "water_heater", "--hold", "60s", "--settle", "1s", "--yes"])
            .env_remove("RUST_LOG")
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .kill_on_drop(true)
            .spawn()
            .unwrap();
        let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
        tokio::time::timeout(Duration::from_secs(30), async {
            while let Some(line) = lines.next_line().await.unwrap() {
                if line.contains("water_heater: ON") {
                    return;
                }
            }
            panic!("the step test ended before switching on");
        })
        .await
        .expect("the load is switched on");
        tokio::time::timeout(Duration::from_secs(10), async {
            while plant.devices.coil(3, 0) != Some(true) {
                tokio::time::sleep(Duration::from_millis(50)).await;
            }
        })
        .await
        .expect("the coil closes");
        let pid = child.id().unwrap().to_string();
        assert!(std::process::Command::new("kill").args([signal, &pid]).status().unwrap().success());
        let out = tokio::time::timeout(Duration::from_secs(20), child.wait_with_output())
            .await
            .expect("the step test stops")
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(1), "{signal}: {err}");
        assert!(err.contains("interrupted: the load was switched OFF again"), "{signal}: {err}");
        assert_eq!(plant.devices.coil(3, 0), Some(false), "{signal}: the heater's coil is open again");
    }
    let _ = std::fs::remove_dir_all(path.parent().unwrap());
}

/// `read` on an MQTT site leaves nothing on the broker: its link's `online`/`offline`
/// status under `<prefix>/read/status` is not retained and it has no last will (a
/// walk-through found `offline` retained there after every `read` and `step-test`).
#[tokio::test]
async fn read_over_mqtt_leaves_no_retained_status_behind() {
    let broker = support::broker::Broker::start().await;
    let port = broker.addr.port();
    let dir = std::env::temp_dir().join(format!("spillway-read-mqtt-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let file = dir.join("plug.yaml");
    std::fs::write(
        &file,
        format!(
            "
site: {{ name: Plug House, timezone: Europe/Dublin, export: allowed }}
mqtt: {{ broker: 127.0.0.1:{port}, topic_prefix: plughouse }}
devices:
  home: {{ mqtt: true }}
points:
  grid: {{ device: home, topic: home/meter, unit: W }}
"
        ),
    )
    .unwrap();
    let publisher = {
        let broker = broker.clone();
        tokio::spawn(async move {
            loop {
                broker.publish("home/meter", "420", false);
                tokio::time::sleep(Duration::from_millis(200)).await;
            }
        })
    };
    let (code, out, err) = spillway(&["read", file.to_str().unwrap()]).await;
    publisher.abort();
    assert_eq!(code, 0, "{out}\n{err}");
    assert_eq!(broker.retained("plughouse/read/status"), None, "{out}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// A relay module that refuses a switching order (a coil address it does not have, as
/// a module at another address or of another make answers): the controller's warning
/// says the write was refused, not "ignored", names the load it was for and what to
/// check. Reads keep their own wording. (Modbus exception 0x02, Illegal Data Address:
/// Modbus Application Protocol Specification V1.1b3, section 7.)
#[tokio::test]
async fn a_refused_switching_order_names_its_load_and_what_to_check() {
    use tokio::io::{AsyncBufReadExt, BufReader};
    let plant = Plant::start(0.0).await;
    plant.devices.with(|s| {
        s.exceptions.insert((5, 0), ExceptionCode::IllegalDataAddress);
        s.exceptions.insert((15, 0), ExceptionCode::IllegalDataAddress);
    });
    let dir = std::env::temp_dir().join(format!("spillway-commission-refused-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let site = dir.join("bench.yaml");
    std::fs::write(&site, plant.site_yaml(LOADS, "")).unwrap();
    let mut child = Command::new(env!("CARGO_BIN_EXE_spillway"))
        .arg("run")
        .arg(&site)
        .arg("--state")
        .arg(dir.join("bench.state.json"))
        .env_remove("RUST_LOG")
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .kill_on_drop(true)
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stderr.take().unwrap()).lines();
    let mut log = String::new();
    let found = tokio::time::timeout(Duration::from_secs(30), async {
        while let Some(line) = lines.next_line().await.unwrap() {
            log.push_str(&line);
            log.push('\n');
            if line.contains("write refused by the device") {
                return line;
            }
        }
        String::new()
    })
    .await;
    let _ = child.start_kill();
    let _ = child.wait().await;
    let line = found.unwrap_or_else(|_| panic!("no refused write logged within 30 s:\n{log}"));
    assert!(line.contains("device=relays") && line.contains("address=0"), "{line}");
    assert!(line.contains("written_for=water_heater"), "the load the coil switches: {line}");
    assert!(
        line.contains("the coil address 0 and the `unit` of device \\\"relays\\\" in the site file")
            || line.contains("the coil address 0 and the `unit` of device \"relays\" in the site file"),
        "{line}"
    );
    assert!(!log.contains("exception response ignored"), "{log}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// A relay module has no points, only the coils the loads switch: `read` reads those
/// back (it writes nothing), so a module that is unplugged behind its gateway or set to
/// another unit id shows as not answering — exit 1, FAIL in the record — instead of
/// `(no points configured)` and a PASS. (Read-back of a coil with function 1, Read
/// Coils: Modbus Application Protocol Specification V1.1b3, section 6.1; a gateway's
/// 0x0B for a unit it cannot reach: section 7.)
#[tokio::test]
async fn read_asks_a_relay_module_with_no_points_for_its_coils() {
    let plant = Plant::start(0.0).await;
    let dir = std::env::temp_dir().join(format!("spillway-commission-relays-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("bench.yaml");
    let yaml = plant.site_yaml(LOADS, "");
    std::fs::write(&path, &yaml).unwrap();
    let site = path.display().to_string();
    let record = dir.join("record.md").display().to_string();

    // Present: its coils, decoded, and nothing written.
    plant.devices.unit(3, |u| {
        u.coils.insert(1, true);
    });
    plant.devices.take_log();
    let (code, out, err) = spillway(&["read", &site, "--device", "relays", "--record", &record]).await;
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("  coil 0 (water_heater) off\n"), "{out}");
    assert!(out.contains("  coil 1 (pool_pump) on\n"), "{out}");
    assert!(!out.contains("no points configured"), "{out}");
    let log = plant.devices.take_log();
    assert!(log.iter().any(|r| r.unit == 3 && r.function == 1), "the coils were read: {log:?}");
    assert!(log.iter().all(|r| matches!(r.function, 1..=4)), "read only, never a write: {log:?}");
    assert_eq!(plant.devices.coil(3, 1), Some(true), "left as found");

    // Silent (unplugged behind its gateway): not answering.
    plant.devices.set_silent(true);
    let (code, out, _) = spillway(&["read", &site, "--device", "relays", "--record", &record]).await;
    plant.devices.set_silent(false);
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("error: the device does not answer: no answer within 500 ms"), "{out}");
    let text = std::fs::read_to_string(&record).unwrap();
    assert_eq!(text.matches("- result: **PASS**").count(), 1, "{text}");
    assert_eq!(text.matches("- result: **FAIL**").count(), 1, "{text}");

    // Another unit id: the gateway answers only exceptions, which is no answer either.
    std::fs::write(&path, yaml.replace("unit: 3,", "unit: 9,")).unwrap();
    let (code, out, _) = spillway(&["read", &site, "--device", "relays"]).await;
    assert_eq!(code, 1, "{out}");
    assert!(out.contains("coil 0 (water_heater) not read: exception"), "{out}");
    assert!(out.contains("error: the device does not answer: exception"), "{out}");

    // A device with points lists the targets it carries too: the inverter's limit.
    std::fs::write(&path, &yaml).unwrap();
    let (code, out, err) = spillway(&["read", &site, "--device", "inverter"]).await;
    assert_eq!(code, 0, "{out}\n{err}");
    assert!(out.contains("  holding 10 (inverter limit) 5000.0 W  [0x1388]"), "{out}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// A no-export site with no inverter Spillway may curtail (warning C0254): in fail-safe
/// the loads go off and the PV's surplus is exported. `failsafe-test` judges that export
/// in the safe state (from the meter's readings once its link returns, while the
/// recovery hold keeps the safe state) and fails, saying why; the bound is ENA EREC
/// G100 Issue 1's 5 s.
#[tokio::test]
async fn failsafe_test_fails_a_safe_state_that_exports_with_nothing_to_curtail() {
    let plant = Plant::start(4500.0).await;
    let dir = std::env::temp_dir().join(format!("spillway-commission-nocurtail-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("bench.yaml");
    let yaml = plant.site_yaml(LOADS, "");
    let inverter =
        "inverter:\n  rated: 5kW\n  limit: { device: inverter, register: 10 }\n  limit_unit: W\n  safe_limit: 0W\n";
    assert!(yaml.contains(inverter), "{yaml}");
    std::fs::write(&path, yaml.replace(inverter, "")).unwrap();
    let site_arg = path.display().to_string();
    let (status, out) =
        failsafe_test(&plant, &["failsafe-test", &site_arg, "--yes", "--watch", "3s", "--wait", "30s"]).await;
    assert_eq!(status.code(), Some(1), "{out}");
    let line = out.lines().find(|l| l.starts_with("export in fail-safe:")).unwrap_or_default();
    assert!(line.contains("above the limit (0 W) for "), "{out}");
    assert!(line.contains("from the safe state on: nothing could curtail it"), "{out}");
    assert!(line.contains("in the meter's readings after its return, the safe state still held"), "{out}");
    assert!(out.contains("but the safe state exported: see below"), "{out}");
    assert!(
        out.contains("note: this site has no inverter Spillway may curtail (warning C0254): in fail-safe, with its loads off, all surplus is exported; limit export in hardware or give Spillway the inverter's limit"),
        "{out}"
    );
    assert!(out.contains("result: FAIL"), "{out}");
    let _ = std::fs::remove_dir_all(&dir);
}
