//! The plant over Modbus TCP on loopback: SunSpec reads, coils and discrete inputs,
//! the inverter's power limit, exceptions, a silent meter, restarts.

mod serve_support;

use std::time::Duration;

use serve_support::{INVERTER_W, LIM_ENA, LIM_PCT, LIM_RVRT, METER_W, connect, holding, serve_quiet, sim_wait, within};
use spillway_sim::bus::{INVERTER_UNIT, METER_UNIT, RELAY_UNIT, SENSOR_UNIT, SUNSPEC_BASE};
use tokio_modbus::ExceptionCode;
use tokio_modbus::prelude::*;

// Source: SunSpec information model specification and sunspec/models
// `json/model_1.json`: a SunSpec device starts its map with the marker "SunS"
// (0x5375 0x6E53) at 40000, then model 1 (common, length 66).
#[tokio::test]
async fn meter_answers_with_its_sunspec_marker_and_power() {
    let server = serve_quiet(10.0).await;
    let mut meter = connect(server.modbus_addr(), METER_UNIT).await;
    assert_eq!(holding(&mut meter, SUNSPEC_BASE, 4).await, [0x5375, 0x6E53, 1, 66]);
    // Model 201 follows the common model: id 201, length 105.
    assert_eq!(holding(&mut meter, 40070, 2).await, [201, 105]);
    // W (int16, W_SF = 0 at 40092): 200 W of house − 3000 W of PV, import positive.
    let w = holding(&mut meter, METER_W, 5).await;
    assert_eq!(w[0] as i16, -2800);
    assert_eq!(w[4], 0, "W_SF");
    let reading = server.readings().grid.unwrap();
    assert_eq!(reading.power_w, -2800.0);
    server.stop().await;
}

#[tokio::test]
async fn a_written_coil_closes_the_relay_contact() {
    let server = serve_quiet(10.0).await;
    let mut relays = connect(server.modbus_addr(), RELAY_UNIT).await;
    assert_eq!(inputs(&mut relays).await, [false, false]);
    within(relays.write_single_coil(0, true)).await.unwrap().unwrap();
    assert_eq!(within(relays.read_coils(0, 2)).await.unwrap().unwrap(), [true, false]);
    // The contact follows at the plant's next step.
    sim_wait(&server, 200).await;
    assert_eq!(inputs(&mut relays).await, [true, false]);
    assert!(server.controls().relays[0]);
    // Both coils in one request (function code 15).
    within(relays.write_multiple_coils(0, &[false, true])).await.unwrap().unwrap();
    sim_wait(&server, 200).await;
    assert_eq!(inputs(&mut relays).await, [false, true]);
    // The pump's 750 W shows on the meter once a whole period has passed with it on.
    sim_wait(&server, 2_100).await;
    let mut meter = connect(server.modbus_addr(), METER_UNIT).await;
    assert_eq!(holding(&mut meter, METER_W, 1).await[0] as i16, -2050);
    // The sensor module reports the loads' own meters (input registers 100 + k).
    let mut sensors = connect(server.modbus_addr(), SENSOR_UNIT).await;
    let powers = within(sensors.read_input_registers(100, 2)).await.unwrap().unwrap();
    assert_eq!(powers, [0, 750]);
    server.stop().await;
}

async fn inputs(ctx: &mut tokio_modbus::client::Context) -> Vec<bool> {
    within(ctx.read_discrete_inputs(0, 2)).await.unwrap().unwrap()
}

#[tokio::test]
async fn the_immediate_controls_limit_lowers_pv() {
    let server = serve_quiet(10.0).await;
    let mut inverter = connect(server.modbus_addr(), INVERTER_UNIT).await;
    assert_eq!(holding(&mut inverter, INVERTER_W, 1).await, [3000]);
    // WMaxLimPct = 20.00 % of WMax (5 kW) = 1000 W, no revert timer, enabled; one
    // register at a time (function code 6).
    within(inverter.write_single_register(LIM_PCT, 2000)).await.unwrap().unwrap();
    within(inverter.write_single_register(LIM_ENA, 1)).await.unwrap().unwrap();
    assert_eq!(server.controls().pv_limit_w, Some(1000.0));
    sim_wait(&server, 200).await;
    assert_eq!(holding(&mut inverter, INVERTER_W, 1).await, [1000]);
    assert_eq!(server.readings().pv.power_w, 1000.0);
    // The whole block 40127..=40131 in one request (function code 16): 50 %, with a
    // 2 s revert timer; when it runs out the limit is dropped.
    within(inverter.write_multiple_registers(LIM_PCT, &[5000, 0, 2, 0, 1])).await.unwrap().unwrap();
    sim_wait(&server, 200).await;
    assert_eq!(holding(&mut inverter, INVERTER_W, 1).await, [2500]);
    assert_eq!(holding(&mut inverter, LIM_RVRT, 1).await, [2]);
    sim_wait(&server, 2_200).await;
    assert_eq!(holding(&mut inverter, LIM_ENA, 1).await, [0]);
    assert_eq!(holding(&mut inverter, INVERTER_W, 1).await, [3000]);
    server.stop().await;
}

#[tokio::test]
async fn bad_requests_get_modbus_exceptions() {
    let server = serve_quiet(10.0).await;
    let addr = server.modbus_addr();
    let mut meter = connect(addr, METER_UNIT).await;
    let below_map = within(meter.read_holding_registers(39_990, 2)).await.unwrap();
    assert_eq!(below_map, Err(ExceptionCode::IllegalDataAddress));
    let meter_coils = within(meter.read_coils(0, 1)).await.unwrap();
    assert_eq!(meter_coils, Err(ExceptionCode::IllegalFunction));
    let write_meter = within(meter.write_single_register(METER_W, 0)).await.unwrap();
    assert_eq!(write_meter, Err(ExceptionCode::IllegalDataAddress));
    let mut relays = connect(addr, RELAY_UNIT).await;
    let third_coil = within(relays.write_single_coil(2, true)).await.unwrap();
    assert_eq!(third_coil, Err(ExceptionCode::IllegalDataAddress));
    // The EV setpoint register of a site without a charger.
    let ev_setpoint = within(relays.write_single_register(0, 100)).await.unwrap();
    assert_eq!(ev_setpoint, Err(ExceptionCode::IllegalDataAddress));
    let mut inverter = connect(addr, INVERTER_UNIT).await;
    let over_100_pct = within(inverter.write_single_register(LIM_PCT, 10_001)).await.unwrap();
    assert_eq!(over_100_pct, Err(ExceptionCode::IllegalDataValue));
    // A function code the devices do not implement (22, mask write register).
    let masked = within(relays.masked_write_register(0, 0xFFFF, 0)).await.unwrap();
    assert_eq!(masked, Err(ExceptionCode::IllegalFunction));
    // A rebooting device answers exception 4.
    server.inject_spec("restart:relays+10s").unwrap();
    let rebooting = within(relays.read_coils(0, 2)).await.unwrap();
    assert_eq!(rebooting, Err(ExceptionCode::ServerDeviceFailure));
    server.stop().await;
}

#[tokio::test]
async fn a_silent_meter_does_not_answer_at_all() {
    let server = serve_quiet(10.0).await;
    let mut ctx = connect(server.modbus_addr(), METER_UNIT).await;
    assert_eq!(holding(&mut ctx, SUNSPEC_BASE, 2).await, [0x5375, 0x6E53]);
    server.inject_spec("meter-silent+1h").unwrap();
    let silent = tokio::time::timeout(Duration::from_millis(300), ctx.read_holding_registers(METER_W, 1)).await;
    assert!(silent.is_err(), "the silent meter answered: {silent:?}");
    // No late answer follows: the next request on the same connection, to another unit
    // behind the gateway, gets its own answer.
    ctx.set_slave(Slave(INVERTER_UNIT));
    assert_eq!(holding(&mut ctx, INVERTER_W, 1).await, [3000]);
    // An unknown unit behind the gateway is silent too.
    ctx.set_slave(Slave(9));
    let unknown = tokio::time::timeout(Duration::from_millis(300), ctx.read_holding_registers(0, 1)).await;
    assert!(unknown.is_err(), "unit 9 answered: {unknown:?}");
    server.stop().await;
}

#[tokio::test]
async fn a_restart_drops_connections_and_comes_back_at_power_on() {
    let server = serve_quiet(10.0).await;
    let addr = server.modbus_addr();
    let mut relays = connect(addr, RELAY_UNIT).await;
    within(relays.write_multiple_coils(0, &[true, true])).await.unwrap().unwrap();
    let mut inverter = connect(addr, INVERTER_UNIT).await;
    within(inverter.write_multiple_registers(LIM_PCT, &[1000, 0, 0, 0, 1])).await.unwrap().unwrap();
    sim_wait(&server, 200).await;
    assert_eq!(server.readings().contacts, [true, true]);
    assert_eq!(server.controls().pv_limit_w, Some(500.0));
    let before = server.now_ms();

    within(server.restart()).await.unwrap();

    // The old connections are closed: a request on them fails in the transport.
    let old = within(relays.read_coils(0, 2)).await;
    assert!(old.is_err(), "a connection survived the restart: {old:?}");
    let old = within(inverter.read_holding_registers(INVERTER_W, 1)).await;
    assert!(old.is_err(), "a connection survived the restart: {old:?}");
    // Same port, power-on state: coils open, no limit; the clock carried on.
    assert_eq!(server.modbus_addr(), addr);
    let mut relays = connect(addr, RELAY_UNIT).await;
    assert_eq!(within(relays.read_coils(0, 2)).await.unwrap().unwrap(), [false, false]);
    sim_wait(&server, 200).await;
    assert_eq!(within(relays.read_discrete_inputs(0, 2)).await.unwrap().unwrap(), [false, false]);
    let mut inverter = connect(addr, INVERTER_UNIT).await;
    assert_eq!(holding(&mut inverter, LIM_ENA, 1).await, [0]);
    assert_eq!(server.controls().pv_limit_w, None);
    assert!(server.now_ms() > before);

    // With downtime, connections are refused until the listener is back.
    let restarting = server.restart_after(Duration::from_millis(300));
    let probe = async {
        tokio::time::sleep(Duration::from_millis(100)).await;
        tokio::net::TcpStream::connect(addr).await.is_err()
    };
    let (restarted, refused) = within(async { tokio::join!(restarting, probe) }).await;
    restarted.unwrap();
    assert!(refused, "the listener accepted a connection while down");
    let mut meter = connect(addr, METER_UNIT).await;
    assert_eq!(holding(&mut meter, SUNSPEC_BASE, 2).await, [0x5375, 0x6E53]);
    server.stop().await;
}

#[tokio::test]
async fn stop_closes_the_port() {
    let server = serve_quiet(10.0).await;
    let addr = server.modbus_addr();
    let mut meter = connect(addr, METER_UNIT).await;
    assert_eq!(holding(&mut meter, SUNSPEC_BASE, 2).await, [0x5375, 0x6E53]);
    within(server.stop()).await;
    assert!(within(meter.read_holding_registers(SUNSPEC_BASE, 2)).await.is_err());
    assert!(tokio::net::TcpStream::connect(addr).await.is_err());
}
