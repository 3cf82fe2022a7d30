//! The daemon over real loopback Modbus TCP against a small plant on the test servers:
//! a step in PV on a no-export site is cleared by curtailment and then soaked up by a
//! load; the status API answers over HTTP. Paused tokio clock: the figures printed are
//! tokio time, exact and repeatable, not wall-clock time.

mod daemon_support;
mod support;

use std::time::Duration;

use daemon_support::{HEATER_W, LOADS, Plant, T0, excursions, load, options, plant_until, start, status_until};
use tokio::io::{AsyncReadExt, AsyncWriteExt};

/// The outside bound for bringing export under the limit. Source: ENA Engineering
/// Recommendation G100 Issue 1 (2016), "Technical Guidance for Customer Export Limiting
/// Schemes": 5 s to reduce export to the agreed limit.
const G100_LIMIT: Duration = Duration::from_secs(5);

#[tokio::test(start_paused = true)]
async fn a_pv_step_on_a_no_export_site_is_cleared_within_one_poll_and_one_tick() {
    let plant = Plant::start(0.0).await;
    let daemon = start(&plant.site_yaml(LOADS, ""), options(T0)).await;
    status_until(&daemon, Duration::from_secs(10), "rules in charge", |s| s.mode == "normal").await;
    // Let the start-up settle (the guard releases the initial fail-safe limit).
    tokio::time::sleep(Duration::from_secs(90)).await;
    let before = plant.last().unwrap();
    assert!(before.grid > 0.0, "importing before the step: {before:?}");

    plant.set_pv(4200.0);
    let step_at = plant.last().unwrap().at;
    // The guard keeps the inverter's limit just above what the site consumes while it
    // curtails, so a step in PV may never reach the meter at all. If it does, it must be
    // cleared within one poll period and one tick.
    tokio::time::sleep(Duration::from_secs(2)).await;
    let exported = plant.history().into_iter().find(|s| s.at >= step_at && s.grid < -1.0);
    match exported {
        None => println!("the PV step never reached the meter as export: the limit held PV at the site's consumption"),
        Some(exported) => {
            let cleared = plant_until(&plant, G100_LIMIT, "export cleared", |s| s.grid >= -1.0).await;
            let reaction = cleared.at - exported.at;
            println!(
                "export of {:.0} W at the meter cleared in {} ms of tokio time (poll 1 s + tick 1 s; ENA G100 Issue 1 allows 5 s)",
                -exported.grid,
                reaction.as_millis()
            );
            // One poll period plus one engine tick, plus one plant step of 100 ms.
            assert!(reaction <= Duration::from_millis(2100), "{reaction:?}");
            assert!(cleared.limit < 4200.0 || cleared.heater, "cleared by curtailment or a load: {cleared:?}");
        }
    }

    // The heater then takes the surplus that curtailment was hiding; the guard gives
    // the PV back step by step. With one poll and one tick of delay a release step can
    // overshoot into export, which the next poll catches: each such stretch is at most
    // one release step (200 W/s) and lasts at most a poll plus a tick.
    let s = status_until(&daemon, Duration::from_secs(60), "heater on", |s| load(s, "water_heater").on).await;
    assert_eq!(load(&s, "water_heater").reason, "start_rule");
    let on = plant_until(&plant, Duration::from_secs(60), "heater drawing", |s| s.heater).await;
    tokio::time::sleep(Duration::from_secs(120)).await;
    let after: Vec<_> = plant.history().into_iter().filter(|s| s.at >= on.at).collect();
    let stretches = excursions(&after, 1.0);
    let peak = stretches.iter().map(|e| e.peak_w).fold(0.0, f64::max);
    let longest = stretches.iter().map(|e| e.duration).max().unwrap_or_default();
    println!(
        "with the heater on ({HEATER_W} W), 120 s: {} export stretches, peak {peak:.0} W, longest {} ms",
        stretches.len(),
        longest.as_millis()
    );
    assert!(peak <= 210.0, "export beyond one release step: {stretches:?}");
    assert!(longest <= Duration::from_millis(2100), "{stretches:?}");
    assert!(after.last().unwrap().heater, "the heater still runs");

    daemon.shutdown();
    let summary = daemon.wait().await;
    assert!(summary.switchings >= 1);
    assert!(!plant.devices.coil(3, 0).unwrap(), "heater relay opened at shutdown");
    assert_eq!(plant.devices.holding(2, 10), Some(0), "inverter at its safe limit at shutdown");
}

/// A minimal HTTP/1.1 GET over loopback: status code and body.
async fn get(addr: std::net::SocketAddr, path: &str) -> (u16, String) {
    get_as(addr, &addr.to_string(), path).await
}

/// A GET with the given `Host` header.
async fn get_as(addr: std::net::SocketAddr, host: &str, path: &str) -> (u16, String) {
    let (head, body) = request(addr, host, path).await;
    let code = head.split_whitespace().nth(1).unwrap().parse().unwrap();
    (code, body)
}

/// A GET over loopback: the response head and body.
async fn get_with_head(addr: std::net::SocketAddr, path: &str) -> (String, String) {
    request(addr, &addr.to_string(), path).await
}

async fn request(addr: std::net::SocketAddr, host: &str, path: &str) -> (String, String) {
    let mut s = tokio::net::TcpStream::connect(addr).await.unwrap();
    let req = format!("GET {path} HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n\r\n");
    s.write_all(req.as_bytes()).await.unwrap();
    let mut raw = Vec::new();
    s.read_to_end(&mut raw).await.unwrap();
    let text = String::from_utf8(raw).unwrap();
    let (head, body) = text.split_once("\r\n\r\n").unwrap();
    (head.to_owned(), body.to_owned())
}

#[tokio::test(start_paused = true)]
async fn the_status_api_and_page_answer_over_loopback() {
    let plant = Plant::start(4500.0).await;
    let mut opts = options(T0);
    opts.http = Some("127.0.0.1:0".parse().unwrap());
    let daemon = start(&plant.site_yaml(LOADS, ""), opts).await;
    let addr = daemon.http_addr().unwrap();
    assert!(addr.ip().is_loopback() && addr.port() != 0);
    status_until(&daemon, Duration::from_secs(60), "heater on", |s| load(s, "water_heater").on).await;
    tokio::time::sleep(Duration::from_secs(3)).await;

    let (code, body) = get(addr, "/api/status").await;
    assert_eq!(code, 200);
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(doc["site"], "Bench");
    assert_eq!(doc["mode"], "normal");
    assert_eq!(doc["export_policy"], "forbidden");
    assert!(doc["grid_w"].is_number() && doc["pv_w"].is_number() && doc["surplus_w"].is_number());
    assert_eq!(doc["inverter"]["rated_w"], 5000.0);
    assert!(doc["inverter"]["reason"].is_string() && doc["inverter"]["why"].is_string());
    let heater = &doc["loads"][0];
    assert_eq!(heater["name"], "water_heater");
    assert_eq!(heater["command"], "on");
    assert_eq!(heater["power_w"], 3000.0);
    assert!(heater["why"].as_str().unwrap().contains("stop rule"), "{heater}");
    assert!(heater["runtime_today_s"].is_number() && heater["energy_today_wh"].is_number());
    assert!(heater["override"].is_null());
    let pump = &doc["loads"][1];
    assert_eq!(pump["obligations"][0]["what"], "run 5 h a day");
    assert!(pump["obligations"][0]["fraction"].is_number());
    assert_eq!(doc["devices"].as_array().unwrap().len(), 3);
    assert_eq!(doc["devices"][0]["up"], true);
    assert!(doc["recent"].as_array().unwrap().iter().any(|e| e["text"].as_str().unwrap().contains("water_heater")));

    let (code, page) = get(addr, "/").await;
    assert_eq!(code, 200);
    assert!(page.contains("<html") && page.contains("api/status") && page.contains("setInterval"));
    assert!(!page.contains("http://") && !page.contains("https://"), "the page loads nothing from elsewhere");
    let (code, _) = get(addr, "/nothing-here").await;
    assert_eq!(code, 404);
    // Bound to loopback, it answers loopback names only: a page elsewhere whose own
    // name was pointed at 127.0.0.1 (DNS rebinding) must not read the site's status.
    let (code, _) = get_as(addr, &format!("localhost:{}", addr.port()), "/api/status").await;
    assert_eq!(code, 200);
    let (code, body) = get_as(addr, "rebound.example:8080", "/api/status").await;
    assert_eq!(code, 403);
    assert!(body.contains("answers only to localhost"), "{body}");

    daemon.shutdown();
    daemon.wait().await;
}

/// `/metrics` serves the status document as OpenMetrics text (Prometheus scrapes it):
/// the same numbers as `/api/status`, names with their units, counters since start.
#[tokio::test(start_paused = true)]
async fn the_metrics_endpoint_serves_the_status_as_openmetrics_text() {
    let plant = Plant::start(4500.0).await;
    let mut opts = options(T0);
    opts.http = Some("127.0.0.1:0".parse().unwrap());
    let daemon = start(&plant.site_yaml(LOADS, ""), opts).await;
    let addr = daemon.http_addr().unwrap();
    status_until(&daemon, Duration::from_secs(60), "heater on", |s| load(s, "water_heater").on).await;
    tokio::time::sleep(Duration::from_secs(3)).await;

    let (head, body) = get_with_head(addr, "/metrics").await;
    assert!(head.starts_with("HTTP/1.1 200"), "{head}");
    assert!(head.to_ascii_lowercase().contains("content-type: application/openmetrics-text; version=1.0.0"), "{head}");
    println!("{body}");
    let value = |series: &str| -> f64 {
        let line = body.lines().find(|l| l.starts_with(series)).unwrap_or_else(|| panic!("no {series} in\n{body}"));
        line.rsplit(' ').next().unwrap().parse().unwrap()
    };
    let status = daemon.status().borrow().clone();
    assert_eq!(value("spillway_mode{site=\"Bench\",mode=\"normal\"}"), 1.0);
    assert_eq!(value("spillway_mode{site=\"Bench\",mode=\"failsafe\"}"), 0.0);
    assert!(body.contains("# TYPE spillway_grid_watts gauge") && body.contains("# UNIT spillway_grid_watts watts"));
    assert!(value("spillway_grid_watts{site=\"Bench\"}").is_finite());
    assert_eq!(value("spillway_inverter_rated_watts{site=\"Bench\"}"), 5000.0);
    assert_eq!(value("spillway_load_on{site=\"Bench\",load=\"water_heater\"}"), 1.0);
    assert_eq!(value("spillway_load_power_watts{site=\"Bench\",load=\"water_heater\"}"), 3000.0);
    assert!(value("spillway_load_switchings_total{site=\"Bench\",load=\"water_heater\"}") >= 1.0);
    assert!(value("spillway_ticks_total{site=\"Bench\"}") >= 3.0);
    assert!(value("spillway_grid_import_joules_total{site=\"Bench\"}") >= 0.0);
    assert_eq!(value("spillway_failsafe_entries_total{site=\"Bench\"}"), 0.0);
    assert_eq!(value("spillway_point_fresh{site=\"Bench\",point=\"grid\"}"), 1.0);
    assert_eq!(value("spillway_device_up{site=\"Bench\",device=\"meter\"}"), 1.0);
    assert!(body.ends_with("# EOF\n"), "an OpenMetrics exposition ends with # EOF");
    // The counters and the document agree (the scrape and the status read the same tick
    // or neighbouring ones on the paused clock).
    assert_eq!(
        status.loads[0].switchings as f64,
        value("spillway_load_switchings_total{site=\"Bench\",load=\"water_heater\"}")
    );

    // A silent meter: the grid gauge is left out, the point is not fresh, the fail-safe
    // is counted.
    plant.meter.set_silent(true);
    status_until(&daemon, Duration::from_secs(10), "fail-safe", |s| s.mode == "failsafe").await;
    let (_, body) = get_with_head(addr, "/metrics").await;
    assert!(!body.contains("spillway_grid_watts{"), "a stale meter's reading is not a number to show");
    assert!(body.contains("spillway_point_fresh{site=\"Bench\",point=\"grid\"} 0"));
    assert!(body.contains("spillway_failsafe_entries_total{site=\"Bench\"} 1"));
    assert!(body.contains("spillway_mode{site=\"Bench\",mode=\"failsafe\"} 1"));
    daemon.shutdown();
    daemon.wait().await;
}

/// Export past the limit that the guard cannot clear — here a no-export site with no
/// inverter to curtail and a load that will not start — is warned about once it
/// outlasts what the guard needs (10 s at the default 2 s deadline), with its cause,
/// and shown in the status while it lasts; its end is logged. It used to be silent.
#[tokio::test(start_paused = true)]
async fn export_over_the_limit_the_guard_cannot_clear_is_warned_about_with_its_cause() {
    let plant = Plant::start(2500.0).await;
    let reluctant = "
  - name: pool_pump
    priority: 1
    rated: 1.1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 50kW for 10s
    stop: import > 400W for 10s
";
    let with_inverter = plant.site_yaml(reluctant, "");
    let at = with_inverter.find("inverter:\n  rated").unwrap();
    let end = with_inverter.find("loads:").unwrap();
    let yaml = format!("{}{}", &with_inverter[..at], &with_inverter[end..]);
    let daemon = start(&yaml, options(T0)).await;
    let s = status_until(&daemon, Duration::from_secs(60), "a long stretch over the limit", |s| {
        s.totals.over_limit_now_s.is_some_and(|t| t >= 12.0)
    })
    .await;
    assert!(s.totals.export_over_limit_s >= 12.0, "{:?}", s.totals);
    plant.set_pv(0.0);
    let s = status_until(&daemon, Duration::from_secs(30), "export within the limit", |s| {
        s.totals.over_limit_now_s.is_none()
    })
    .await;
    daemon.shutdown();
    daemon.wait().await;
    // The warning is also a recent event on the status page (checked there: a log line's
    // callsite reached first by a test beside this one can miss a capture).
    let said: Vec<_> = s.recent.iter().filter(|e| e.text.starts_with("export above the limit for")).collect();
    assert_eq!(said.len(), 1, "once per stretch: {:?}", s.recent);
    assert!(said[0].text.contains("no inverter the guard may curtail"), "{}", said[0].text);
}

/// A load whose relay module stops answering may still be doing what it was last told:
/// the status says its command is not delivered and why, until the module answers
/// again. (The fail-safe's "off" sent to a dead module used to show as done.)
#[tokio::test(start_paused = true)]
async fn a_load_whose_relay_module_is_down_is_shown_as_not_delivered() {
    let plant = Plant::start(2500.0).await;
    let daemon = start(&plant.site_yaml(LOADS, ""), options(T0)).await;
    status_until(&daemon, Duration::from_secs(120), "pump on", |s| load(s, "pool_pump").on).await;
    assert!(load(&daemon.status().borrow(), "pool_pump").delivered);
    plant.devices.set_silent(true);
    let s = status_until(&daemon, Duration::from_secs(120), "not delivered", |s| !load(s, "pool_pump").delivered).await;
    let why = &load(&s, "pool_pump").why;
    assert!(why.contains("not delivered: device \"relays\" is down"), "{why}");
    plant.devices.set_silent(false);
    // The recent event of a turn shows from the tick after it.
    let s = status_until(&daemon, Duration::from_secs(120), "delivered again", |s| {
        load(s, "pool_pump").delivered && s.recent.iter().any(|e| e.text == "pool_pump: commands reach it again")
    })
    .await;
    daemon.shutdown();
    daemon.wait().await;
    // The status page's recent events carry both turns (the log says the same; log
    // lines are not checked here: a callsite reached first by a test beside this one
    // can miss a capture).
    let recent: Vec<_> = s.recent.iter().map(|e| e.text.as_str()).collect();
    assert!(
        recent.iter().any(|t| t.starts_with("pool_pump: command not delivered (device \"relays\" is down")),
        "{recent:?}"
    );
    assert!(recent.contains(&"pool_pump: commands reach it again"), "{recent:?}");
}

/// A relay module that is up but refuses the write (a wrong coil address, answered with
/// exception 2) has not carried the command out: the load shows as not delivered, and
/// is not counted as drawing its power, until a re-write goes through.
#[tokio::test(start_paused = true)]
async fn a_load_whose_write_the_module_refuses_is_shown_as_not_delivered() {
    let plant = Plant::start(4500.0).await;
    plant.devices.with(|s| {
        s.exceptions.insert((5, 0), tokio_modbus::ExceptionCode::IllegalDataAddress);
        s.exceptions.insert((15, 0), tokio_modbus::ExceptionCode::IllegalDataAddress);
    });
    let daemon = start(&plant.site_yaml(LOADS, ""), options(T0)).await;
    let s = status_until(&daemon, Duration::from_secs(120), "refused", |s| {
        load(s, "water_heater").on && !load(s, "water_heater").delivered
    })
    .await;
    let why = &load(&s, "water_heater").why;
    assert!(why.contains("not delivered: device \"relays\" refused the write"), "{why}");
    plant.devices.with(|s| s.exceptions.clear());
    status_until(&daemon, Duration::from_secs(60), "delivered after a re-write", |s| load(s, "water_heater").delivered)
        .await;
    assert_eq!(plant.devices.coil(3, 0), Some(true), "the re-write went through");
    daemon.shutdown();
    daemon.wait().await;
}
