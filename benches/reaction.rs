//! Reaction time of the live controller, over loopback Modbus TCP, in real time: from
//! export appearing at the simulated meter (its reported reading goes below −20 W after
//! a step in PV) to the curtailment arriving at the simulated inverter (its limit cut
//! below the PV it was giving). The zero-export example site against the plant
//! simulator served in-process; poll period and engine tick both 1 s, then both 200 ms.
//!
//! `cargo bench --bench reaction` (a bench binary, `harness = false`). Each trial steps
//! the roof from 0 to 4.2 kW; between trials the PV goes back to 0 and the limit is
//! released (the bench raises the guard's release rate to 5 kW/s only to shorten that
//! wait). The meter averages 1 s and reports 0.5 s late, and the site declares that as
//! the grid point's 1.5 s latency: a step that comes soon after the guard last moved
//! the limit waits for a reading that postdates that change; both cases are measured.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use spillway::daemon::{Daemon, Options};
use spillway_sim::plant::Plant;
use spillway_sim::pv_output::{PvSample, PvSource};
use spillway_sim::serve::{ServeOptions, Server, ServerHandle};
use spillway_sim::site::from_site_yaml;

const SITE: &str = include_str!("../config/zero-export-house.yaml");
const TRIALS: usize = 10;

#[derive(Clone, Default)]
struct StepPv(Arc<AtomicU64>);

impl StepPv {
    fn set(&self, w: f64) {
        self.0.store(w.to_bits(), Ordering::Relaxed);
    }
}

impl PvSource for StepPv {
    fn step(&mut self, _t_ms: i64, _dt_s: f64, limit_w: Option<f64>) -> PvSample {
        let available = f64::from_bits(self.0.load(Ordering::Relaxed));
        let ac = limit_w.map_or(available, |l| available.min(l.max(0.0)));
        PvSample { ac_w: ac, available_ac_w: available, dc_w: ac / 0.97, clear_sky_index: 1.0, ..PvSample::default() }
    }
}

fn meter(h: &ServerHandle) -> f64 {
    h.readings().grid.map_or(f64::NAN, |g| g.power_w)
}

async fn until(limit: Duration, mut cond: impl FnMut() -> bool) -> Option<Instant> {
    let deadline = Instant::now() + limit;
    loop {
        if cond() {
            return Some(Instant::now());
        }
        if Instant::now() > deadline {
            return None;
        }
        tokio::time::sleep(Duration::from_millis(2)).await;
    }
}

async fn run(period: &str, gap: Duration) -> Vec<Duration> {
    let cfg = match from_site_yaml(SITE) {
        Ok(Some(c)) => c,
        _ => panic!("the example site has no plant"),
    };
    let pv = StepPv::default();
    let start_ms = 1_782_036_000_000; // 2026-06-21 11:00 in Lisbon
    let plant = Plant::new(&cfg, Box::new(pv.clone()), start_ms, 7).unwrap();
    let options = ServeOptions { step: Some(Duration::from_millis(100)), ..ServeOptions::default() };
    let sim = Server::start(plant, options).await.unwrap();
    let text = SITE
        .replace("127.0.0.1:5020", &sim.modbus_addr().to_string())
        .replace("unit: 1, sunspec: true }", &format!("unit: 1, sunspec: true, poll: {period} }}"))
        .replace("unit: 2, sunspec: true }", &format!("unit: 2, sunspec: true, poll: {period} }}"))
        .replace(
            "  import_target: 40W",
            &format!("  import_target: 40W\n  tick: {period}\n  guard: {{ release_rate: 5kW }}"),
        );
    let site = match spillway::config::load_str("reaction.yaml", &text) {
        Ok(l) => Arc::new(l.site),
        Err(e) => panic!("{}", e.render(false)),
    };
    let clock = spillway::sources::Clock::Scaled {
        origin: tokio::time::Instant::now(),
        at: spillway::units::Timestamp(sim.now_ms()),
        speed: 1.0,
    };
    let daemon = Daemon::start(site, Options { clock, ..Options::default() }).await.unwrap();
    tokio::time::sleep(Duration::from_secs(5)).await;
    let mut out = Vec::new();
    for _ in 0..TRIALS {
        pv.set(0.0);
        // Importing, and the limit given back, so the next step exports in full.
        let h = &sim;
        if until(Duration::from_secs(30), || meter(h) > 0.0 && h.controls().pv_limit_w.is_none_or(|l| l >= 4200.0))
            .await
            .is_none()
        {
            eprintln!("limit not released within 30 s; trial skipped");
            continue;
        }
        tokio::time::sleep(gap).await;
        pv.set(4200.0);
        let Some(exported) = until(Duration::from_secs(5), || meter(h) < -20.0).await else {
            eprintln!("no export after the step; trial skipped");
            continue;
        };
        let pv_then = sim.readings().pv.power_w;
        let cut = until(Duration::from_secs(10), || {
            sim.controls().pv_limit_w.is_some_and(|l| l < pv_then - 500.0) || sim.controls().relays.iter().any(|r| *r)
        })
        .await;
        match cut {
            Some(t) => out.push(t - exported),
            None => eprintln!("no curtailment within 10 s"),
        }
        tokio::time::sleep(Duration::from_secs(2)).await;
    }
    daemon.shutdown();
    daemon.wait().await;
    sim.stop().await;
    out
}

fn pct(sorted: &[Duration], p: f64) -> Duration {
    let i = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[i.min(sorted.len() - 1)]
}

fn main() {
    // `cargo test --benches` runs bench binaries with `--bench` absent: keep that quick.
    if !std::env::args().any(|a| a == "--bench") {
        println!("reaction: run with `cargo bench --bench reaction`");
        return;
    }
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    // A step long after the limit last moved, and one soon after it was given back (the
    // guard then waits for a reading that postdates that change, by the point latency).
    let cases = [("1s", 6000), ("1s", 1500), ("200ms", 6000), ("200ms", 1500)];
    for (period, gap_ms) in cases {
        let mut d = rt.block_on(run(period, Duration::from_millis(gap_ms)));
        d.sort();
        if d.is_empty() {
            println!("poll/tick {period}: no trial completed");
            continue;
        }
        println!(
            "poll/tick {period:>5}, step {:.1} s after the last limit change: p50 {} ms, p95 {} ms, max {} ms ({} trials)",
            gap_ms as f64 / 1000.0,
            pct(&d, 0.5).as_millis(),
            pct(&d, 0.95).as_millis(),
            d.last().map_or(0, |x| x.as_millis()),
            d.len()
        );
    }
}
