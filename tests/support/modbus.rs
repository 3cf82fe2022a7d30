//! A Modbus TCP test server on tokio-modbus's server side, with a strict register map
//! (unmapped addresses answer IllegalDataAddress), a request log, and faults: silence
//! (requests go unanswered) and reboots (connections dropped, coils reset).

use std::collections::{BTreeMap, HashMap};
use std::future;
use std::net::SocketAddr;
use std::sync::{Arc, Mutex};

use tokio::net::TcpListener;
use tokio_modbus::server::Service;
use tokio_modbus::server::tcp::{Server, accept_tcp_connection};
use tokio_modbus::{ExceptionCode, Request, Response, SlaveRequest};
use tokio_util::sync::CancellationToken;

/// One unit's data tables.
#[derive(Debug, Default, Clone)]
pub struct Unit {
    pub coils: BTreeMap<u16, bool>,
    pub discrete: BTreeMap<u16, bool>,
    pub input: BTreeMap<u16, u16>,
    pub holding: BTreeMap<u16, u16>,
}

/// A request as the server saw it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Logged {
    pub unit: u8,
    pub function: u8,
    pub address: u16,
    pub count: u16,
}

#[derive(Debug, Default)]
pub struct State {
    pub units: HashMap<u8, Unit>,
    pub log: Vec<Logged>,
    /// Requests go unanswered while set.
    pub silent: bool,
    /// Forced exceptions by (function, address).
    pub exceptions: HashMap<(u8, u16), ExceptionCode>,
}

#[derive(Clone)]
struct Handler(Arc<Mutex<State>>);

impl Service for Handler {
    type Request = SlaveRequest<'static>;
    type Response = Option<Response>;
    type Exception = ExceptionCode;
    type Future = future::Ready<Result<Option<Response>, ExceptionCode>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        let mut s = self.0.lock().unwrap();
        future::ready(s.handle(req.slave, req.request))
    }
}

fn read<T: Copy>(map: &BTreeMap<u16, T>, addr: u16, cnt: u16) -> Result<Vec<T>, ExceptionCode> {
    (0..cnt).map(|i| map.get(&addr.wrapping_add(i)).copied().ok_or(ExceptionCode::IllegalDataAddress)).collect()
}

fn write<T: Copy>(map: &mut BTreeMap<u16, T>, addr: u16, values: &[T]) -> Result<(), ExceptionCode> {
    for i in 0..values.len() as u16 {
        if !map.contains_key(&addr.wrapping_add(i)) {
            return Err(ExceptionCode::IllegalDataAddress);
        }
    }
    for (i, v) in values.iter().enumerate() {
        map.insert(addr.wrapping_add(i as u16), *v);
    }
    Ok(())
}

impl State {
    fn handle(&mut self, unit: u8, req: Request<'static>) -> Result<Option<Response>, ExceptionCode> {
        let (function, address, count) = match &req {
            Request::ReadCoils(a, n) => (1, *a, *n),
            Request::ReadDiscreteInputs(a, n) => (2, *a, *n),
            Request::ReadHoldingRegisters(a, n) => (3, *a, *n),
            Request::ReadInputRegisters(a, n) => (4, *a, *n),
            Request::WriteSingleCoil(a, _) => (5, *a, 1),
            Request::WriteSingleRegister(a, _) => (6, *a, 1),
            Request::WriteMultipleCoils(a, v) => (15, *a, v.len() as u16),
            Request::WriteMultipleRegisters(a, v) => (16, *a, v.len() as u16),
            _ => return Err(ExceptionCode::IllegalFunction),
        };
        self.log.push(Logged { unit, function, address, count });
        if self.silent {
            return Ok(None);
        }
        if let Some(code) = self.exceptions.get(&(function, address)) {
            return Err(*code);
        }
        let Some(u) = self.units.get_mut(&unit) else {
            return Err(ExceptionCode::GatewayTargetDevice);
        };
        Ok(Some(match req {
            Request::ReadCoils(a, n) => Response::ReadCoils(read(&u.coils, a, n)?),
            Request::ReadDiscreteInputs(a, n) => Response::ReadDiscreteInputs(read(&u.discrete, a, n)?),
            Request::ReadHoldingRegisters(a, n) => Response::ReadHoldingRegisters(read(&u.holding, a, n)?),
            Request::ReadInputRegisters(a, n) => Response::ReadInputRegisters(read(&u.input, a, n)?),
            Request::WriteSingleCoil(a, v) => {
                write(&mut u.coils, a, &[v])?;
                Response::WriteSingleCoil(a, v)
            }
            Request::WriteSingleRegister(a, v) => {
                write(&mut u.holding, a, &[v])?;
                Response::WriteSingleRegister(a, v)
            }
            Request::WriteMultipleCoils(a, v) => {
                write(&mut u.coils, a, &v)?;
                Response::WriteMultipleCoils(a, v.len() as u16)
            }
            Request::WriteMultipleRegisters(a, v) => {
                write(&mut u.holding, a, &v)?;
                Response::WriteMultipleRegisters(a, v.len() as u16)
            }
            _ => return Err(ExceptionCode::IllegalFunction),
        }))
    }
}

/// The running server.
pub struct TestServer {
    pub addr: SocketAddr,
    state: Arc<Mutex<State>>,
    generation: Arc<Mutex<CancellationToken>>,
    stop: CancellationToken,
}

impl TestServer {
    /// Binds 127.0.0.1:0 and serves until dropped.
    pub async fn start() -> TestServer {
        let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let state = Arc::new(Mutex::new(State::default()));
        let generation = Arc::new(Mutex::new(CancellationToken::new()));
        let stop = CancellationToken::new();
        let server = Arc::new(Server::new(listener));
        {
            let (state, generation, stop) = (state.clone(), generation.clone(), stop.clone());
            tokio::spawn(async move {
                loop {
                    let g = generation.lock().unwrap().clone();
                    let handler = Handler(state.clone());
                    let on_connected = |stream, socket_addr| {
                        let handler = handler.clone();
                        async move { accept_tcp_connection(stream, socket_addr, |_| Ok(Some(handler.clone()))) }
                    };
                    // Dropping `serve` cancels every connection task it started.
                    tokio::select! {
                        _ = server.serve(&on_connected, |_| {}) => return,
                        () = g.cancelled() => {}
                        () = stop.cancelled() => return,
                    }
                }
            });
        }
        TestServer { addr, state, generation, stop }
    }

    /// Changes the server's state.
    pub fn with<T>(&self, f: impl FnOnce(&mut State) -> T) -> T {
        f(&mut self.state.lock().unwrap())
    }

    pub fn unit(&self, unit: u8, f: impl FnOnce(&mut Unit)) {
        self.with(|s| f(s.units.entry(unit).or_default()));
    }

    pub fn set_holding(&self, unit: u8, start: u16, words: &[u16]) {
        self.unit(unit, |u| {
            for (i, w) in words.iter().enumerate() {
                u.holding.insert(start + i as u16, *w);
            }
        });
    }

    pub fn set_input(&self, unit: u8, start: u16, words: &[u16]) {
        self.unit(unit, |u| {
            for (i, w) in words.iter().enumerate() {
                u.input.insert(start + i as u16, *w);
            }
        });
    }

    pub fn add_coils(&self, unit: u8, start: u16, n: u16) {
        self.unit(unit, |u| {
            for i in 0..n {
                u.coils.insert(start + i, false);
            }
        });
    }

    pub fn coil(&self, unit: u8, address: u16) -> Option<bool> {
        self.with(|s| s.units.get(&unit)?.coils.get(&address).copied())
    }

    pub fn holding(&self, unit: u8, address: u16) -> Option<u16> {
        self.with(|s| s.units.get(&unit)?.holding.get(&address).copied())
    }

    /// The request log so far, cleared.
    pub fn take_log(&self) -> Vec<Logged> {
        self.with(|s| std::mem::take(&mut s.log))
    }

    pub fn set_silent(&self, silent: bool) {
        self.with(|s| s.silent = silent);
    }

    /// A power cycle: every connection dropped, every coil back to off.
    pub fn reboot(&self) {
        self.with(|s| {
            for u in s.units.values_mut() {
                for c in u.coils.values_mut() {
                    *c = false;
                }
            }
        });
        let mut g = self.generation.lock().unwrap();
        g.cancel();
        *g = CancellationToken::new();
    }
}

impl Drop for TestServer {
    fn drop(&mut self) {
        self.stop.cancel();
    }
}

/// Lays out a SunSpec map on `unit`: the `SunS` marker at `base`, then each model's
/// id, length and zeroed body, then the end marker (0xFFFF, 0). Returns each model's
/// start address (of its ID register).
pub fn sunspec_map(server: &TestServer, unit: u8, base: u16, models: &[(u16, u16)]) -> Vec<u16> {
    server.set_holding(unit, base, &[0x5375, 0x6E53]);
    let mut at = base + 2;
    let mut starts = Vec::new();
    for &(id, len) in models {
        starts.push(at);
        let mut words = vec![id, len];
        words.extend(std::iter::repeat_n(0u16, usize::from(len)));
        server.set_holding(unit, at, &words);
        at += 2 + len;
    }
    server.set_holding(unit, at, &[0xFFFF, 0]);
    starts
}
