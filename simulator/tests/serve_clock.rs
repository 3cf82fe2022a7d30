//! The server's clock, on tokio's paused test clock: simulated time is exactly speed ×
//! wall time, in fixed steps, and the physics does not depend on the speed. No wall
//! time is measured: the paused clock only moves when every task waits.

mod serve_support;

use std::time::Duration;

use serve_support::{START_MS, quiet_plant, serve_quiet};
use spillway_sim::plant::Flows;
use spillway_sim::serve::{ServeOptions, Server};

/// Sleeps `wall` and half a tick more, so that the tick due at `wall` has run whatever
/// order the runtime wakes the two timers in.
async fn sleep_past(wall: Duration, tick: Duration) {
    tokio::time::sleep(wall + tick / 2).await;
}

#[tokio::test(start_paused = true)]
async fn ten_times_faster_means_ten_simulated_seconds_per_second() {
    let server = serve_quiet(10.0).await;
    let t0 = server.now_ms();
    assert_eq!(t0, START_MS + 5_000, "the quiet plant starts 5 s in");
    sleep_past(Duration::from_secs(30), server.clock().tick()).await;
    assert_eq!(server.now_ms() - t0, 300_000);
    server.stop().await;
}

#[tokio::test(start_paused = true)]
async fn real_time_steps_by_100_ms_and_fast_time_by_1_s() {
    let plant = quiet_plant();
    let t0 = plant.now_ms();
    let server = Server::start(plant, ServeOptions::default()).await.unwrap();
    assert_eq!(server.clock().step_ms, 100);
    sleep_past(Duration::from_secs(2), server.clock().tick()).await;
    assert_eq!(server.now_ms() - t0, 2_000);
    server.stop().await;

    let plant = quiet_plant();
    let t0 = plant.now_ms();
    let server = Server::start(plant, ServeOptions { speed: 3600.0, ..ServeOptions::default() }).await.unwrap();
    assert_eq!(server.clock().step_ms, 1_000);
    // 3600 steps an hour of simulated time per wall second, 36 per 10 ms tick.
    sleep_past(Duration::from_secs(2), server.clock().tick()).await;
    assert_eq!(server.now_ms() - t0, 7_200_000);
    server.stop().await;
}

#[tokio::test(start_paused = true)]
async fn the_physics_does_not_depend_on_the_speed() {
    // The same plant at 10× and at 100×, both in 1 s steps, read at the same simulated
    // instant: identical energies.
    let run = |speed: f64, wall: Duration| async move {
        let options = ServeOptions { speed, step: Some(Duration::from_secs(1)), ..ServeOptions::default() };
        let server = Server::start(quiet_plant(), options).await.unwrap();
        server.with_plant(|p| p.controls_mut().relays[0] = true);
        sleep_past(wall, server.clock().tick()).await;
        let (now, flows): (i64, Flows) = server.with_plant(|p| (p.now_ms(), p.flows().clone()));
        server.stop().await;
        (now, flows)
    };
    let slow = run(10.0, Duration::from_secs(60)).await;
    let fast = run(100.0, Duration::from_secs(6)).await;
    assert_eq!(slow.0, START_MS + 5_000 + 600_000);
    assert_eq!(slow, fast);
    assert!(slow.1.loads[0].wh > 400.0, "the tank heated for 10 min at 3 kW: {:?}", slow.1.loads[0]);
}

#[tokio::test(start_paused = true)]
async fn a_restart_keeps_the_clock_running() {
    let server = serve_quiet(10.0).await;
    let t0 = server.now_ms();
    sleep_past(Duration::from_secs(1), server.clock().tick()).await;
    server.restart().await.unwrap();
    sleep_past(Duration::from_secs(1), server.clock().tick()).await;
    let elapsed = server.now_ms() - t0;
    assert!((20_000..=21_000).contains(&elapsed), "{elapsed} ms simulated in 2 s at 10×");
    server.stop().await;
}

#[tokio::test(start_paused = true)]
async fn faults_injected_at_run_time_count_from_the_moment_of_injection() {
    let server = serve_quiet(10.0).await;
    sleep_past(Duration::from_secs(1), server.clock().tick()).await;
    // Silent from 2 s after now, for 3 s: the meter's reading stops updating.
    server.inject_spec("meter-silent@2s+3s").unwrap();
    let injected = server.now_ms();
    server.wait_until(injected + 1_000).await;
    let fresh = server.readings().grid.unwrap().updated_ms;
    assert!(fresh >= injected, "updated at {fresh}, injected at {injected}");
    server.wait_until(injected + 4_500).await;
    let frozen = server.readings().grid.unwrap().updated_ms;
    assert!(frozen <= injected + 2_000, "updated at {frozen} while silent");
    server.wait_until(injected + 7_000).await;
    assert!(server.readings().grid.unwrap().updated_ms >= injected + 5_000);
    // A stuck relay: the coil is written, the contact stays open.
    server.inject_spec("relay-stuck:pump:open").unwrap();
    server.with_plant(|p| p.controls_mut().relays[1] = true);
    server.wait_until(server.now_ms() + 1_000).await;
    assert_eq!(server.readings().contacts, [false, false]);
    assert!(server.inject_spec("relay-stuck:sauna").is_err(), "an unknown channel is refused");
    server.stop().await;
}

#[tokio::test(start_paused = true)]
async fn the_clock_holds_at_its_end() {
    let plant = quiet_plant();
    let t0 = plant.now_ms();
    let options = ServeOptions { speed: 100.0, hold_at_ms: Some(t0 + 60_000), ..ServeOptions::default() };
    let server = Server::start(plant, options).await.unwrap();
    server.wait_until(t0 + 60_000).await;
    sleep_past(Duration::from_secs(10), server.clock().tick()).await;
    assert_eq!(server.now_ms(), t0 + 60_000);
    server.stop().await;
}
