//! Modbus TCP in front of the device bus: one listener, every unit behind it (as behind
//! a gateway), requests translated one-to-one onto [`Bus`] calls. The bus decides;
//! this file only maps function codes and errors.

use std::future::{Ready, ready};
use std::io;
use std::net::SocketAddr;
use std::sync::Weak;
use std::time::Duration;

use tokio::net::{TcpListener, TcpSocket, TcpStream};
use tokio_modbus::server::tcp::{Server, accept_tcp_connection};
use tokio_modbus::{ExceptionCode, Request, Response, SlaveRequest};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tokio_util::task::task_tracker::TaskTrackerToken;

use super::{ServeError, Shared};
use crate::bus::{Bus, BusError, Data, Table};

/// Binds the listener with `SO_REUSEADDR`, so that a restart can take the same port
/// again while the connections it dropped linger in `TIME_WAIT`.
pub(super) fn bind(addr: SocketAddr) -> Result<TcpListener, ServeError> {
    let bind_error = |source| ServeError::Bind { addr, source };
    let socket = if addr.is_ipv4() { TcpSocket::new_v4() } else { TcpSocket::new_v6() }.map_err(bind_error)?;
    socket.set_reuseaddr(true).map_err(bind_error)?;
    socket.bind(addr).map_err(bind_error)?;
    socket.listen(128).map_err(bind_error)
}

/// Serves Modbus TCP on `listener` until `cancel`. Each connection's service holds a
/// token of `connections`, so waiting on that tracker waits until every connection of
/// this listener is closed.
pub(super) async fn serve(
    listener: TcpListener,
    shared: Weak<Shared>,
    cancel: CancellationToken,
    connections: TaskTracker,
) {
    let server = Server::new(listener);
    let new_service = |_peer: SocketAddr| {
        Ok(Some(Service { shared: shared.clone(), cancel: cancel.clone(), _open: connections.token() }))
    };
    let on_connected = |stream: TcpStream, peer: SocketAddr| {
        // Answers go out at once rather than waiting for Nagle's timer.
        if let Err(err) = stream.set_nodelay(true) {
            tracing::debug!(%peer, %err, "cannot set TCP_NODELAY");
        }
        ready(accept_tcp_connection(stream, peer, new_service))
    };
    let on_process_error = |err: io::Error| tracing::debug!(%err, "modbus connection closed on an error");
    loop {
        // Cancel safety: dropping `serve` cancels every connection it spawned (its drop
        // guard), which is what a stop or restart wants.
        tokio::select! {
            biased;
            () = cancel.cancelled() => return,
            result = server.serve(&on_connected, on_process_error) => {
                // `serve` only returns when `accept` fails (e.g. out of file descriptors);
                // its connections are gone with it. Listen again after a breath.
                if let Err(err) = result {
                    tracing::warn!(%err, "modbus listener: accept failed, listening again in 100 ms");
                }
            }
        }
        tokio::select! {
            biased;
            () = cancel.cancelled() => return,
            () = tokio::time::sleep(Duration::from_millis(100)) => {}
        }
    }
}

/// One connection's view of the plant.
struct Service {
    /// Weak, so a connection never keeps a stopped server's plant alive.
    shared: Weak<Shared>,
    /// The listener generation: once cancelled (stop, restart) nothing is answered.
    cancel: CancellationToken,
    /// Counts this connection as open until the service is dropped with it.
    _open: TaskTrackerToken,
}

impl tokio_modbus::server::Service for Service {
    type Request = SlaveRequest<'static>;
    type Response = Option<Response>;
    type Exception = ExceptionCode;
    type Future = Ready<Result<Option<Response>, ExceptionCode>>;

    fn call(&self, req: SlaveRequest<'static>) -> Self::Future {
        if self.cancel.is_cancelled() {
            return ready(Ok(None));
        }
        let Some(shared) = self.shared.upgrade() else {
            return ready(Ok(None));
        };
        let mut plant = shared.plant();
        ready(answer(plant.bus_mut(), req.slave, req.request))
    }
}

fn words(data: Data) -> Vec<u16> {
    match data {
        Data::Registers(w) => w,
        Data::Bits(_) => Vec::new(),
    }
}

fn bits(data: Data) -> Vec<bool> {
    match data {
        Data::Bits(b) => b,
        Data::Registers(_) => Vec::new(),
    }
}

/// Maps one request onto the bus. `Ok(None)` = no response at all (a silent device,
/// an unknown unit): the client's own timeout fires.
pub(super) fn answer(bus: &mut Bus, unit: u8, request: Request<'_>) -> Result<Option<Response>, ExceptionCode> {
    let result = match request {
        Request::ReadCoils(address, count) => {
            bus.read(unit, Table::Coils, address, count).map(|d| Response::ReadCoils(bits(d)))
        }
        Request::ReadDiscreteInputs(address, count) => {
            bus.read(unit, Table::DiscreteInputs, address, count).map(|d| Response::ReadDiscreteInputs(bits(d)))
        }
        Request::ReadHoldingRegisters(address, count) => {
            bus.read(unit, Table::HoldingRegisters, address, count).map(|d| Response::ReadHoldingRegisters(words(d)))
        }
        Request::ReadInputRegisters(address, count) => {
            bus.read(unit, Table::InputRegisters, address, count).map(|d| Response::ReadInputRegisters(words(d)))
        }
        Request::WriteSingleCoil(address, value) => {
            bus.write_coil(unit, address, value).map(|()| Response::WriteSingleCoil(address, value))
        }
        Request::WriteMultipleCoils(address, values) => {
            bus.write_coils(unit, address, &values).map(|()| Response::WriteMultipleCoils(address, values.len() as u16))
        }
        Request::WriteSingleRegister(address, value) => {
            bus.write_register(unit, address, value).map(|()| Response::WriteSingleRegister(address, value))
        }
        Request::WriteMultipleRegisters(address, values) => bus
            .write_registers(unit, address, &values)
            .map(|()| Response::WriteMultipleRegisters(address, values.len() as u16)),
        // Function codes the plant's devices do not implement (17, 22, 23, 43 and any
        // custom one): a device that is up says so; a silent one stays silent.
        _ => bus.check_unit(unit).and(Err(BusError::IllegalFunction { unit, table: Table::HoldingRegisters })),
    };
    match result {
        Ok(response) => Ok(Some(response)),
        Err(BusError::Timeout { .. }) => Ok(None),
        Err(err) => Err(exception(&err)),
    }
}

/// The Modbus exception a bus error stands for.
fn exception(err: &BusError) -> ExceptionCode {
    match err {
        BusError::IllegalFunction { .. } => ExceptionCode::IllegalFunction,
        BusError::IllegalDataAddress { .. } => ExceptionCode::IllegalDataAddress,
        BusError::IllegalDataValue { .. } => ExceptionCode::IllegalDataValue,
        // The MQTT-only errors cannot come from a Modbus request; a device failure is
        // the honest answer if one ever does.
        BusError::ServerDeviceFailure { .. }
        | BusError::Timeout { .. }
        | BusError::UnknownTopic(_)
        | BusError::BadPayload { .. } => ExceptionCode::ServerDeviceFailure,
    }
}
