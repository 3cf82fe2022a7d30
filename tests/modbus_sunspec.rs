//! SunSpec over Modbus TCP against our own test server: discovery at each base,
//! points resolved by model and name, and the power-limit controls of models 123 and
//! 704 written and refreshed.
//!
//! Every offset written literally below is taken from the published model
//! definitions. Source: SunSpec Alliance, `sunspec/models`, `json/model_1.json`
//! (L = 66), `json/model_103.json` (L = 50; W at +14, W_SF at +15),
//! `json/model_203.json` (L = 105; W at +18, W_SF at +22), `json/model_123.json`
//! (L = 24; WMaxLimPct +5, WMaxLimPct_RvrtTms +7, WMaxLim_Ena +9, WMaxLimPct_SF +23),
//! `json/model_704.json` (L = 65; WMaxLimPctEna +14, WMaxLimPct +15, WMaxLimPctRvrt
//! +16, WMaxLimPctEnaRvrt +17, WMaxLimPctRvrtTms +18..+19 uint32, WMaxLimPct_SF +54),
//! as shipped in pySunSpec2 1.3.7. Offsets count from the model's ID register.

mod support;

use std::sync::Arc;
use std::time::Duration;

use spillway::actuators::{ActuatorOptions, Dispatcher};
use spillway::config::model::Site;
use spillway::engine::{Decisions, LimitReason, Mode};
use spillway::sources::modbus::sunspec::{ModelMap, locate};
use spillway::sources::{Clock, ModbusLink, ModbusOptions, SourceEvent};
use spillway::units::{Power, Timestamp};
use support::modbus::{Logged, TestServer, sunspec_map};
use support::{drain_for, site, wait_for};
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

const T0: Timestamp = Timestamp(1_780_000_000_000);

fn yaml(port: u16) -> String {
    format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: forbidden
devices:
  inv: {{ modbus_tcp: 127.0.0.1:{port}, unit: 1, sunspec: true, poll: 1s, timeout: 500ms }}
points:
  grid: {{ device: inv, sunspec: 203.W }}
  pv: {{ device: inv, sunspec: 103.W }}
inverter:
  rated: 5kW
  limit: sunspec
  safe_limit: 500W
  refresh: 10s
"
    )
}

struct Bench {
    server: TestServer,
    site: Arc<Site>,
    events: mpsc::Receiver<SourceEvent>,
    dispatcher: Dispatcher,
    cancel: CancellationToken,
    task: tokio::task::JoinHandle<()>,
}

async fn start(server: TestServer) -> Bench {
    let yaml = yaml(server.addr.port());
    start_with(server, &yaml).await
}

async fn start_with(server: TestServer, yaml: &str) -> Bench {
    let site = site(yaml);
    let (id, _) = site.device("inv").unwrap();
    let link = ModbusLink::new(site.clone(), id, ModbusOptions::default()).unwrap();
    let dispatcher = Dispatcher::new(site.clone(), ActuatorOptions::default());
    let (tx, events) = mpsc::channel(1024);
    let cancel = CancellationToken::new();
    let task = tokio::spawn(link.run(dispatcher.device(id).unwrap(), tx, Clock::anchored(T0), cancel.clone()));
    Bench { server, site, events, dispatcher, cancel, task }
}

fn limit(w: Option<f64>) -> Decisions {
    Decisions {
        now: T0,
        loads: Vec::new(),
        inverter_limit: w.map(Power),
        limit_reason: LimitReason::ExportGuard,
        mode: Mode::Normal,
        surplus: Power::ZERO,
        grid: None,
        switchings: Vec::new(),
    }
}

fn writes(log: &[Logged]) -> Vec<(u8, u16, u16)> {
    log.iter().filter(|l| l.function > 4).map(|l| (l.function, l.address, l.count)).collect()
}

#[tokio::test(start_paused = true)]
async fn discovery_finds_the_chain_at_each_base_and_resolves_meter_and_inverter_w() {
    for base in [40000u16, 50000, 0] {
        let server = TestServer::start().await;
        let starts = sunspec_map(&server, 1, base, &[(1, 66), (203, 105), (103, 50)]);
        let (meter, inverter) = (starts[1], starts[2]);
        // Meter W = -1500 × 10^0 (exporting), inverter W = 2345 × 10^-1.
        server.set_holding(1, meter + 18, &[(-1500i16) as u16]);
        server.set_holding(1, meter + 22, &[0]);
        server.set_holding(1, inverter + 14, &[2345]);
        server.set_holding(1, inverter + 15, &[(-1i16) as u16]);
        let mut b = start(server).await;

        let (found_base, models) = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
            SourceEvent::Discovered { base, models, .. } => Some((*base, models.clone())),
            _ => None,
        })
        .await;
        assert_eq!(found_base, base);
        assert_eq!(
            models,
            vec![(1, base + 2), (203, base + 70), (103, base + 177)],
            "each model starts after the previous one's 2 + L registers"
        );
        let (grid, pv) = (b.site.point("grid").unwrap().0, b.site.point("pv").unwrap().0);
        let mut got = (None, None);
        while got.0.is_none() || got.1.is_none() {
            let (p, v) = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
                SourceEvent::Sample { point, value, .. } => Some((*point, *value)),
                _ => None,
            })
            .await;
            if p == grid {
                got.0 = Some(v);
            } else if p == pv {
                got.1 = Some(v);
            }
        }
        assert_eq!(got, (Some(-1500.0), Some(234.5)), "base {base}");
        b.cancel.cancel();
        b.task.await.unwrap();
    }
}

/// A meter that counts export as positive is flipped by the point's `scale`, applied
/// after the SunSpec scale factor found by discovery.
#[tokio::test(start_paused = true)]
async fn a_sunspec_points_scale_multiplies_the_value_after_its_scale_factor() {
    let server = TestServer::start().await;
    let starts = sunspec_map(&server, 1, 40000, &[(1, 66), (203, 105), (103, 50)]);
    // Meter W = 1500 × 10^1 (this meter's +15 kW means export).
    server.set_holding(1, starts[1] + 18, &[1500]);
    server.set_holding(1, starts[1] + 22, &[1]);
    let yaml = yaml(server.addr.port()).replace("sunspec: 203.W }", "sunspec: 203.W, scale: -1 }");
    let mut b = start_with(server, &yaml).await;
    let grid = b.site.point("grid").unwrap().0;
    let v = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
        SourceEvent::Sample { point, value, .. } if *point == grid => Some(*value),
        _ => None,
    })
    .await;
    assert_eq!(v, -15_000.0, "1500 × 10^1 × −1");
    b.cancel.cancel();
    b.task.await.unwrap();
}

#[test]
fn published_offsets_resolve_to_absolute_addresses() {
    let map =
        ModelMap { base: 40000, models: vec![(1, 40002, 66), (203, 40070, 105), (103, 40177, 50), (123, 40229, 24)] };
    let w = map.resolve(203, "W").unwrap();
    assert_eq!((w.address, w.scale_factor), (40070 + 18, Some(40070 + 22)));
    let w = map.resolve(103, "W").unwrap();
    assert_eq!((w.address, w.scale_factor), (40177 + 14, Some(40177 + 15)));
    let e = map.resolve(203, "TotWhImp").unwrap();
    // Source: json/model_203.json — TotWhImp acc32 at +46, TotWh_SF at +54.
    assert_eq!((e.address, e.scale_factor), (40070 + 46, Some(40070 + 54)));
    assert!(map.resolve(201, "W").unwrap_err().contains("no SunSpec model 201"));
    assert!(map.resolve(203, "TotWhImpt").unwrap_err().contains("did you mean TotWhImp"));
    assert!(map.resolve(1, "Mn").unwrap_err().contains("text"));
    for (point, offset) in [("WMaxLimPct", 5), ("WMaxLimPct_RvrtTms", 7), ("WMaxLim_Ena", 9), ("WMaxLimPct_SF", 23)] {
        assert_eq!(locate(123, point).unwrap().offset, offset, "123.{point}");
    }
    for (point, offset) in [
        ("WMaxLimPctEna", 14),
        ("WMaxLimPct", 15),
        ("WMaxLimPctRvrt", 16),
        ("WMaxLimPctEnaRvrt", 17),
        ("WMaxLimPctRvrtTms", 18),
        ("WMaxLimPct_SF", 54),
    ] {
        assert_eq!(locate(704, point).unwrap().offset, offset, "704.{point}");
    }
    // Source: json/model_120.json and model_121.json as shipped in pySunSpec2 1.3.7 —
    // WRtg at +3 with WRtg_SF at +4; WMax at +2 with WMax_SF at +22.
    for (model, point, offset, sf) in [(120, "WRtg", 3, 4), (121, "WMax", 2, 22)] {
        let l = locate(model, point).unwrap();
        assert_eq!((l.offset, l.sf_offset), (offset, Some(sf)), "{model}.{point}");
    }
    // Model lengths: the last point ends at 2 + L.
    for (model, last, len) in [
        (1, "Pad", 66),
        (103, "EvtVnd4", 50),
        (120, "Pad", 26),
        (121, "ECPNomHz_SF", 30),
        (203, "Evt", 105),
        (123, "VArPct_SF", 24),
        (704, "PFWAbsRvrt.Ext", 65),
    ] {
        let l = locate(model, last).unwrap();
        assert_eq!(l.offset + l.size, 2 + len, "model {model}");
    }
}

/// SunSpec takes `WMaxLimPct` as a percentage of the device's `WMax` (model 121), not
/// of whatever the site file calls the rating: a 4 kW `WMax` under a site that says
/// 5 kW must get 62.5 % for 2.5 kW, or the inverter would be held at 2 kW.
#[tokio::test(start_paused = true)]
async fn the_limit_percentage_is_taken_of_the_devices_own_wmax() {
    let server = TestServer::start().await;
    let starts = sunspec_map(&server, 1, 40000, &[(1, 66), (203, 105), (103, 50), (121, 30), (123, 24)]);
    let (m121, c) = (starts[3], starts[4]);
    // Source: json/model_121.json (pySunSpec2 1.3.7): WMax at +2, WMax_SF at +22.
    server.set_holding(1, m121 + 2, &[400]);
    server.set_holding(1, m121 + 22, &[1]); // 400 × 10^1 = 4 kW
    server.set_holding(1, c + 23, &[(-2i16) as u16]); // WMaxLimPct_SF = -2
    let mut b = start(server).await;
    wait_for(&mut b.events, Duration::from_secs(5), |e| matches!(e, SourceEvent::Readback { .. }).then_some(())).await;
    b.dispatcher.apply(&limit(Some(2500.0)));
    drain_for(&mut b.events, Duration::from_millis(200)).await;
    assert_eq!(b.server.holding(1, c + 5), Some(6250), "2.5 kW of a 4 kW WMax = 62.50 %");
    b.cancel.cancel();
    b.task.await.unwrap();
}

#[tokio::test(start_paused = true)]
async fn model_123_limit_is_written_and_rewritten_well_inside_its_revert_timer() {
    let server = TestServer::start().await;
    let starts = sunspec_map(&server, 1, 40000, &[(1, 66), (203, 105), (103, 50), (123, 24)]);
    let c = starts[3];
    server.set_holding(1, c + 23, &[(-2i16) as u16]); // WMaxLimPct_SF = -2
    server.set_holding(1, c + 5, &[10000]); // 100.00 % before we start
    let mut b = start(server).await;
    let rb = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
        SourceEvent::Readback { values, .. } => Some(values.clone()),
        _ => None,
    })
    .await;
    assert_eq!(rb[0].target, "sunspec limit %");
    assert_eq!(rb[0].value, Some(100.0));

    // 2.5 kW of 5 kW rated = 50 % = 5000 × 10^-2.
    b.dispatcher.apply(&limit(Some(2500.0)));
    drain_for(&mut b.events, Duration::from_millis(200)).await;
    let w = writes(&b.server.take_log());
    assert_eq!(w, vec![(6, c + 7, 1), (6, c + 5, 1), (6, c + 9, 1)]);
    assert_eq!(b.server.holding(1, c + 5), Some(5000));
    // Revert timer 4 × refresh = 40 s; enabled.
    assert_eq!(b.server.holding(1, c + 7), Some(40));
    assert_eq!(b.server.holding(1, c + 9), Some(1));

    // Unchanged, the limit is re-written every 10 s: four times inside one timer.
    drain_for(&mut b.events, Duration::from_millis(39_500)).await;
    let w = writes(&b.server.take_log());
    assert_eq!(w.iter().filter(|x| x.1 == c + 5).count(), 3, "{w:?}");
    // The inverter cleared its limit (as if the timer had run out): the next refresh
    // puts it back.
    b.server.set_holding(1, c + 9, &[0]);
    drain_for(&mut b.events, Duration::from_secs(10)).await;
    assert_eq!(b.server.holding(1, c + 9), Some(1));

    // No limit = 100 %.
    b.dispatcher.apply(&limit(None));
    drain_for(&mut b.events, Duration::from_millis(200)).await;
    assert_eq!(b.server.holding(1, c + 5), Some(10000));
    b.cancel.cancel();
    b.task.await.unwrap();
}

#[tokio::test(start_paused = true)]
async fn model_704_programs_its_reversion_limit_so_the_inverter_curtails_itself() {
    let server = TestServer::start().await;
    let starts = sunspec_map(&server, 1, 40000, &[(1, 66), (203, 105), (103, 50), (123, 24), (704, 65)]);
    let (c123, d) = (starts[3], starts[4]);
    server.set_holding(1, d + 54, &[0]); // WMaxLimPct_SF = 0
    let mut b = start(server).await;
    wait_for(&mut b.events, Duration::from_secs(5), |e| matches!(e, SourceEvent::Readback { .. }).then_some(())).await;
    b.dispatcher.apply(&limit(Some(1000.0)));
    drain_for(&mut b.events, Duration::from_millis(200)).await;
    // One fc 16 over +14..=+19: enable, 20 % limit, 10 % reversion limit (the 500 W
    // safe limit of 5 kW), reversion enable, reversion time 40 s (uint32).
    assert_eq!(writes(&b.server.take_log()), vec![(16, d + 14, 6)]);
    let regs: Vec<u16> = (14..20).map(|o| b.server.holding(1, d + o).unwrap()).collect();
    assert_eq!(regs, vec![1, 20, 10, 1, 0, 40]);
    // Model 123 is left alone where 704 is present.
    for o in 2..26 {
        assert_eq!(b.server.holding(1, c123 + o), Some(0), "123 +{o}");
    }
    // Refreshed inside the reversion time.
    drain_for(&mut b.events, Duration::from_secs(10)).await;
    assert_eq!(writes(&b.server.take_log()), vec![(16, d + 14, 6)]);
    b.cancel.cancel();
    b.task.await.unwrap();
}
