//! `spillway-sim serve` as a user runs it: it prints the bound address, answers on it,
//! stops cleanly on SIGTERM or after `--run-for`, and refuses a bad fault spec.

mod serve_support;

use std::io::{BufRead, BufReader};
use std::process::{Command, Stdio};

use serve_support::{SUNSPEC_BASE_MARKER, connect, holding};
use spillway_sim::bus::{METER_UNIT, SUNSPEC_BASE};

fn sim() -> Command {
    Command::new(env!("CARGO_BIN_EXE_spillway-sim"))
}

fn site(name: &str) -> String {
    format!("{}/../config/{name}", env!("CARGO_MANIFEST_DIR"))
}

#[tokio::test]
async fn serves_a_site_file_until_terminated() {
    let mut child = sim()
        .args(["serve", "--site", &site("zero-export-house.yaml"), "--modbus", "127.0.0.1:0"])
        .args(["--speed", "10", "--start", "2026-06-21T12:00:00", "--weather", "clear", "--status-every", "0"])
        .args(["--fault", "relay-stuck:tank@1h+1min"])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut out = BufReader::new(child.stdout.take().unwrap());
    let mut first = String::new();
    out.read_line(&mut first).unwrap();
    // "spillway-sim: Modbus TCP on 127.0.0.1:PORT (unit 1 meter, …"
    let addr = first.split_whitespace().nth(4).unwrap_or_default();
    assert!(first.contains("from 2026-06-21 12:00:00 WEST"), "{first}");
    let mut meter = connect(addr.parse().unwrap(), METER_UNIT).await;
    assert_eq!(holding(&mut meter, SUNSPEC_BASE, 2).await, SUNSPEC_BASE_MARKER);

    let killed = Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap();
    assert!(killed.success());
    let status = child.wait().unwrap();
    let rest: Vec<String> = out.lines().map_while(Result::ok).collect();
    assert!(status.success(), "exit {status:?}: {rest:?}");
    assert_eq!(rest.last().map(String::as_str), Some("spillway-sim: stopped (terminated)"), "{rest:?}");
}

/// A fault typed at the terminal starts at once: the meter goes silent for the fail-safe
/// test the installer is running against the simulator; a typo is answered, not fatal.
#[tokio::test]
async fn a_fault_typed_on_standard_input_starts_at_once() {
    use std::io::Write as _;
    use tokio_modbus::client::Reader as _;
    let mut child = sim()
        .args(["serve", "--site", &site("zero-export-house.yaml"), "--modbus", "127.0.0.1:0"])
        .args(["--start", "2026-06-21T12:00:00", "--status-every", "0"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut out = BufReader::new(child.stdout.take().unwrap());
    let mut first = String::new();
    out.read_line(&mut first).unwrap();
    let addr = first.split_whitespace().nth(4).unwrap_or_default().to_owned();
    let mut meter = connect(addr.parse().unwrap(), METER_UNIT).await;
    assert_eq!(holding(&mut meter, SUNSPEC_BASE, 2).await, SUNSPEC_BASE_MARKER);

    let mut stdin = child.stdin.take().unwrap();
    writeln!(stdin, "relay-stuck:sauna").unwrap();
    writeln!(stdin, "meter-silent+10min").unwrap();
    let mut said = Vec::new();
    for _ in 0..2 {
        let mut line = String::new();
        out.read_line(&mut line).unwrap();
        said.push(line.trim_end().to_owned());
    }
    assert!(said[0].contains("no relay channel \"sauna\""), "{said:?}");
    assert_eq!(said[1], "spillway-sim: fault injected now: meter-silent+10min", "{said:?}");
    let answer =
        tokio::time::timeout(std::time::Duration::from_millis(1500), meter.read_holding_registers(SUNSPEC_BASE, 2))
            .await;
    assert!(!matches!(answer, Ok(Ok(Ok(_)))), "the silent meter answered: {answer:?}");

    drop(stdin);
    let killed = Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap();
    assert!(killed.success());
    assert!(child.wait().unwrap().success());
}

#[test]
fn stops_by_itself_after_the_run_time() {
    let out = sim()
        .args(["serve", "--site", &site("battery-ev-limited-export.yaml"), "--modbus", "127.0.0.1:0"])
        .args(["--speed", "3600", "--start", "2026-06-21T10:00:00", "--run-for", "20min"])
        .args(["--status-every", "0", "--fault", "meter-silent@5min+1min"])
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "{stdout}\n{}", String::from_utf8_lossy(&out.stderr));
    assert!(stdout.contains("fault scheduled: meter-silent@5min+1min"), "{stdout}");
    // The last status line is at the end of the run, in the site's time zone.
    assert!(stdout.contains("2026-06-21 10:20:00"), "{stdout}");
    assert!(stdout.ends_with("spillway-sim: stopped (the --run-for time is up)\n"), "{stdout}");
}

#[test]
fn a_bad_fault_spec_is_refused_with_the_syntax() {
    let out = sim()
        .args(["serve", "--site", &site("zero-export-house.yaml"), "--modbus", "127.0.0.1:0"])
        .args(["--fault", "meter-silent@noon"])
        .output()
        .unwrap();
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("fault `meter-silent@noon`: the start `noon` is neither a duration"), "{stderr}");
    let out = sim()
        .args(["serve", "--site", &site("zero-export-house.yaml"), "--modbus", "127.0.0.1:0"])
        .args(["--fault", "relay-stuck:sauna"])
        .output()
        .unwrap();
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("no relay channel \"sauna\""), "{stderr}");
}

#[test]
fn a_site_file_given_as_a_plant_file_points_to_site() {
    let out =
        sim().args(["serve", "--plant", &site("zero-export-house.yaml"), "--modbus", "127.0.0.1:0"]).output().unwrap();
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("not a plant file but a site file: give it with --site"), "{stderr}");
}

#[test]
fn help_documents_every_flag() {
    let out = sim().args(["serve", "--help"]).output().unwrap();
    let help = String::from_utf8_lossy(&out.stdout);
    for flag in [
        "--plant",
        "--site",
        "--modbus",
        "--mqtt",
        "--speed",
        "--step",
        "--start",
        "--seed",
        "--weather",
        "--fault",
        "--status-every",
        "--run-for",
    ] {
        assert!(help.contains(flag), "{flag} missing from:\n{help}");
    }
}
