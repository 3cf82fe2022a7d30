//! Serial lines and the Modbus RTU devices on them. An RS-485 line carries several
//! devices at their own unit ids; the port opens once per process, so the devices on
//! one port share one open port and one RTU context, and each request takes the line
//! in turn, addressed to its device's unit.
//!
//! The line also does what the RTU framing needs and the client library does not: the
//! silent interval between frames, a per-request timeout that covers the exchange only
//! (not the wait for the line), and telling a device that stays silent from one whose
//! answers arrive garbled (bytes heard, no valid frame: baud, parity or wiring).

use std::collections::HashMap;
use std::fmt;
use std::io;
use std::pin::Pin;
use std::sync::{Arc, Mutex as StdMutex};
use std::task::{Context as TaskCx, Poll};
use std::time::Duration;

use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::time::{Instant, sleep_until, timeout};
use tokio_modbus::client::{Client, Context};
use tokio_modbus::slave::SlaveContext;
use tokio_modbus::{Request, Response, Slave};
use tracing::{debug, info, warn};

use crate::config::model::{Link, Parity};

/// The serial lines of one process, by port. Every Modbus RTU device of a site gets
/// its line from the same `SerialLines`, so devices on one port share it.
#[derive(Debug, Default)]
pub struct SerialLines {
    lines: StdMutex<HashMap<String, Arc<Line>>>,
}

impl SerialLines {
    /// An empty set of lines.
    pub fn new() -> Arc<Self> {
        Arc::new(SerialLines::default())
    }

    /// The line of an RTU link's port (`None` for other links). The port is known by
    /// the file it resolves to where it exists, so `/dev/serial/by-id/…` and the
    /// `/dev/ttyUSB0` it names are one line.
    pub(crate) fn line(&self, link: &Link) -> Option<Arc<Line>> {
        let Link::ModbusRtu { path, baud, parity, stop_bits, .. } = link else { return None };
        let key = std::fs::canonicalize(path).map_or_else(|_| path.clone(), |p| p.display().to_string());
        let mut lines = self.lines.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
        let line = lines.entry(key).or_insert_with(|| {
            Arc::new(Line {
                path: path.clone(),
                baud: *baud,
                parity: *parity,
                stop_bits: *stop_bits,
                gap: frame_gap(*baud, *parity, *stop_bits),
                state: tokio::sync::Mutex::new(LineState::default()),
                garbled_log: StdMutex::new(RateLimit::default()),
            })
        });
        Some(Arc::clone(line))
    }
}

/// The silent interval that must separate two frames on the line (t3.5): 3.5
/// character times, or a fixed 1.75 ms above 19200 Bd. Source: Modbus over Serial Line
/// Specification and Implementation Guide V1.02, §2.5.1.1 (MODBUS Message RTU Framing):
/// a character is 11 bits (start, 8 data, parity or a second stop bit, stop);
/// without parity and with one stop bit we count the 10 bits actually sent.
pub fn frame_gap(baud: u32, parity: Parity, stop_bits: u8) -> Duration {
    if baud > 19_200 {
        return Duration::from_micros(1750);
    }
    let bits = f64::from(char_bits(parity, stop_bits));
    Duration::from_secs_f64(3.5 * bits / f64::from(baud.max(1)))
}

/// Bits on the wire per character: start, 8 data bits, parity if any, stop bits.
/// Source: Modbus over Serial Line V1.02, §2.5.1 (the RTU character format).
pub fn char_bits(parity: Parity, stop_bits: u8) -> u32 {
    1 + 8 + u32::from(parity != Parity::None) + u32::from(stop_bits.max(1))
}

/// Why a request on a serial line got no usable answer; carried inside the
/// `io::Error` of a transport error so the device's link can word it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum LineFault {
    /// Nothing at all arrived within the timeout.
    NoAnswer(Duration),
    /// Bytes arrived but made no valid frame: `bad_crc` when they end in a checksum
    /// that does not match them.
    Garbled {
        /// The bytes heard (at most the first 16, for the log).
        heard: Vec<u8>,
        /// Whether their last two bytes are a CRC that does not match the rest.
        bad_crc: bool,
    },
    /// The port is held by another process.
    InUse,
}

/// What to check when a line's answers arrive garbled. Common practice: a wrong baud
/// rate, parity or stop bits, swapped A/B wires or a missing or doubled termination
/// resistor all show as checksum errors.
pub const GARBLED_ADVICE: &str =
    "answers with bad checksums: check baud, parity, stop bits, the A/B polarity and termination";

/// What to do when the port is held by another process.
pub const IN_USE_ADVICE: &str = "the serial port is in use — is the controller running? (`systemctl stop spillway`)";

impl fmt::Display for LineFault {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            LineFault::NoAnswer(limit) => write!(f, "no answer within {}", crate::units::format_duration(*limit)),
            LineFault::Garbled { .. } => f.write_str(GARBLED_ADVICE),
            LineFault::InUse => f.write_str(IN_USE_ADVICE),
        }
    }
}

impl std::error::Error for LineFault {}

impl LineFault {
    /// The fault inside a transport error, if the line put one there.
    pub fn of(e: &tokio_modbus::Error) -> Option<&LineFault> {
        match e {
            tokio_modbus::Error::Transport(e) => Self::of_io(e),
            tokio_modbus::Error::Protocol(_) => None,
        }
    }

    /// The fault inside an I/O error, if the line put one there.
    pub fn of_io(e: &io::Error) -> Option<&LineFault> {
        e.get_ref().and_then(|inner| inner.downcast_ref::<LineFault>())
    }

    fn into_io(self) -> io::Error {
        let kind = match self {
            LineFault::NoAnswer(_) => io::ErrorKind::TimedOut,
            LineFault::Garbled { .. } => io::ErrorKind::InvalidData,
            LineFault::InUse => io::ErrorKind::ResourceBusy,
        };
        io::Error::new(kind, self)
    }
}

/// One serial port and the context on it.
pub(crate) struct Line {
    path: String,
    baud: u32,
    parity: Parity,
    stop_bits: u8,
    gap: Duration,
    state: tokio::sync::Mutex<LineState>,
    garbled_log: StdMutex<RateLimit>,
}

impl fmt::Debug for Line {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Line").field("path", &self.path).field("baud", &self.baud).finish_non_exhaustive()
    }
}

#[derive(Default)]
struct LineState {
    /// The open port's context and the tap on its input; `None` while closed.
    open: Option<(Context, Arc<StdMutex<Vec<u8>>>)>,
    /// A request was under way when its caller gave up (cancelled, or its own timeout
    /// fired): the context may hold half an exchange and is reopened before use.
    in_flight: bool,
    /// The line must stay silent until then (t3.5 after the last frame).
    quiet_until: Option<Instant>,
    /// Whether the port was ever opened, and whether the last attempt failed: the
    /// opening is logged once, and again only after a failure, not on every reopen.
    opened_before: bool,
    failing: bool,
}

#[derive(Default)]
struct RateLimit {
    last: Option<Instant>,
    suppressed: u32,
}

/// How often a line logs garbled answers at most.
const GARBLED_LOG_EVERY: Duration = Duration::from_secs(60);

impl Line {
    /// A context for `unit` on this line, after making sure the port opens; each
    /// request then waits for the line and gets `limit` for its own exchange.
    pub(crate) async fn attach(self: &Arc<Self>, unit: u8, limit: Duration) -> io::Result<Context> {
        {
            let mut st = self.state.lock().await;
            if st.in_flight {
                st.open = None;
                st.in_flight = false;
            }
            if st.open.is_none() {
                self.open(&mut st)?;
            }
        }
        let client: Box<dyn Client> = Box::new(UnitClient { line: Arc::clone(self), unit, limit });
        Ok(Context::from(client))
    }

    fn open(&self, st: &mut LineState) -> io::Result<()> {
        let builder = tokio_serial::new(&self.path, self.baud)
            .data_bits(tokio_serial::DataBits::Eight)
            .parity(match self.parity {
                Parity::None => tokio_serial::Parity::None,
                Parity::Even => tokio_serial::Parity::Even,
                Parity::Odd => tokio_serial::Parity::Odd,
            })
            .stop_bits(if self.stop_bits == 2 { tokio_serial::StopBits::Two } else { tokio_serial::StopBits::One });
        let port = match tokio_serial::SerialStream::open(&builder) {
            Ok(p) => p,
            Err(e) => {
                st.failing = true;
                return Err(if held_elsewhere(&e) { LineFault::InUse.into_io() } else { io::Error::from(e) });
            }
        };
        // Bytes left in the input from before (a late answer) would be read as the
        // next request's answer.
        let _ = tokio_serial::SerialPort::clear(&port, tokio_serial::ClearBuffer::Input);
        if !st.opened_before || st.failing {
            info!(port = %self.path, baud = self.baud, "serial port opened");
        } else {
            debug!(port = %self.path, "serial port reopened");
        }
        st.opened_before = true;
        st.failing = false;
        let heard = Arc::new(StdMutex::new(Vec::new()));
        let tap = Tap { inner: port, heard: Arc::clone(&heard) };
        st.open = Some((tokio_modbus::client::rtu::attach(tap), heard));
        Ok(())
    }

    /// The error for a request whose answer arrived garbled, logged (rate-limited).
    fn garbled(&self, unit: u8, heard: Vec<u8>) -> tokio_modbus::Error {
        self.report_garbled(unit, &heard);
        let bad_crc = ends_in_bad_crc(&heard);
        LineFault::Garbled { heard: heard.into_iter().take(16).collect(), bad_crc }.into_io().into()
    }

    /// Logs a garbled answer, at most once a minute per line, with the count of the
    /// ones not logged since. The client library logs each bad frame many times over;
    /// its log target is off by default (`cli/logging.rs`), this is the one line instead.
    fn report_garbled(&self, unit: u8, heard: &[u8]) {
        let mut r = self.garbled_log.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
        let now = Instant::now();
        if r.last.is_some_and(|t| now.duration_since(t) < GARBLED_LOG_EVERY) {
            r.suppressed += 1;
            return;
        }
        let suppressed = std::mem::take(&mut r.suppressed);
        r.last = Some(now);
        let bytes: Vec<String> = heard.iter().map(|b| format!("{b:02X}")).collect();
        warn!(port = %self.path, unit, heard = %bytes.join(" "), suppressed, "{GARBLED_ADVICE}");
    }
}

/// A device's view of the line: requests go to its unit.
struct UnitClient {
    line: Arc<Line>,
    unit: u8,
    limit: Duration,
}

impl fmt::Debug for UnitClient {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("UnitClient").field("line", &self.line).field("unit", &self.unit).finish()
    }
}

impl SlaveContext for UnitClient {
    fn set_slave(&mut self, slave: Slave) {
        self.unit = slave.into();
    }
}

#[async_trait::async_trait]
impl Client for UnitClient {
    async fn call(&mut self, request: Request<'_>) -> tokio_modbus::Result<Response> {
        let line = &self.line;
        // Fair (first come, first served): the devices on the line take turns.
        let mut st = line.state.lock().await;
        if std::mem::take(&mut st.in_flight) {
            st.open = None;
        }
        if st.open.is_none() {
            line.open(&mut st)?;
        }
        if let Some(t) = st.quiet_until {
            sleep_until(t).await;
        }
        let st = &mut *st;
        let Some((ctx, heard)) = st.open.as_mut() else {
            return Err(io::Error::from(io::ErrorKind::NotConnected).into());
        };
        heard.lock().unwrap_or_else(std::sync::PoisonError::into_inner).clear();
        ctx.set_slave(Slave(self.unit));
        // Dropped here (the caller cancelled), the flag stays set and the next request
        // reopens the port.
        st.in_flight = true;
        let r = timeout(self.limit, ctx.call(request)).await;
        st.in_flight = false;
        st.quiet_until = Some(Instant::now() + line.gap);
        match r {
            Ok(Ok(answer)) => Ok(answer),
            Ok(Err(e)) => {
                // A transport error, or an answer that does not fit the request (a late
                // one from another unit): start again on a fresh port. The library gives
                // up on a long run of undecodable bytes with `InvalidData`: garbled too.
                let heard = std::mem::take(&mut *heard.lock().unwrap_or_else(std::sync::PoisonError::into_inner));
                st.open = None;
                match &e {
                    tokio_modbus::Error::Transport(io)
                        if io.kind() == io::ErrorKind::InvalidData && !heard.is_empty() =>
                    {
                        Err(line.garbled(self.unit, heard))
                    }
                    _ => Err(e),
                }
            }
            Err(_) => {
                let heard = std::mem::take(&mut *heard.lock().unwrap_or_else(std::sync::PoisonError::into_inner));
                st.open = None;
                if heard.is_empty() {
                    return Err(LineFault::NoAnswer(self.limit).into_io().into());
                }
                Err(line.garbled(self.unit, heard))
            }
        }
    }

    async fn disconnect(&mut self) -> io::Result<()> {
        // The port is the line's, shared with the other devices on it: it stays open.
        Ok(())
    }
}

/// Whether opening a port failed because another process holds it: the serial crate
/// takes an exclusive `flock` (its message: "Unable to acquire exclusive lock on serial
/// port") after setting `TIOCEXCL`, which makes a second open fail with EBUSY.
fn held_elsewhere(e: &tokio_serial::Error) -> bool {
    e.description.contains("exclusive lock")
        || matches!(e.kind, tokio_serial::ErrorKind::Io(io::ErrorKind::ResourceBusy))
        || e.description.contains("resource busy")
}

/// Whether `bytes`, taken as one frame, end in a CRC-16/MODBUS that does not match the
/// bytes before it. Source for the CRC: Modbus over Serial Line V1.02, §6.2.2.
pub fn ends_in_bad_crc(bytes: &[u8]) -> bool {
    if bytes.len() < 4 {
        return false;
    }
    let (body, crc) = bytes.split_at(bytes.len() - 2);
    crc16(body) != u16::from_le_bytes([crc[0], crc[1]])
}

fn crc16(data: &[u8]) -> u16 {
    let mut crc: u16 = 0xFFFF;
    for &b in data {
        crc ^= u16::from(b);
        for _ in 0..8 {
            crc = if crc & 1 != 0 { (crc >> 1) ^ 0xA001 } else { crc >> 1 };
        }
    }
    crc
}

/// The serial port, keeping a copy of what it reads since the last request.
struct Tap {
    inner: tokio_serial::SerialStream,
    heard: Arc<StdMutex<Vec<u8>>>,
}

impl fmt::Debug for Tap {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Tap").finish_non_exhaustive()
    }
}

impl AsyncRead for Tap {
    fn poll_read(self: Pin<&mut Self>, cx: &mut TaskCx<'_>, buf: &mut ReadBuf<'_>) -> Poll<io::Result<()>> {
        let this = self.get_mut();
        let before = buf.filled().len();
        let r = Pin::new(&mut this.inner).poll_read(cx, buf);
        if let Poll::Ready(Ok(())) = &r {
            let mut heard = this.heard.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
            // A frame is at most 256 bytes (Modbus over Serial Line V1.02, §2.5.1.1).
            if heard.len() < 512 {
                heard.extend_from_slice(&buf.filled()[before..]);
            }
        }
        r
    }
}

impl AsyncWrite for Tap {
    fn poll_write(self: Pin<&mut Self>, cx: &mut TaskCx<'_>, data: &[u8]) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().inner).poll_write(cx, data)
    }

    fn poll_flush(self: Pin<&mut Self>, cx: &mut TaskCx<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().inner).poll_flush(cx)
    }

    fn poll_shutdown(self: Pin<&mut Self>, cx: &mut TaskCx<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().inner).poll_shutdown(cx)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frame_gap_is_three_and_a_half_characters_up_to_19200_baud() {
        // Source: Modbus over Serial Line V1.02, §2.5.1.1: t3.5 is 3.5 character
        // times; above 19200 Bd a fixed 1.750 ms. 9600 Bd 8E1: 11 bits a character,
        // 3.5 × 11 / 9600 s = 4.01 ms.
        let g = frame_gap(9600, Parity::Even, 1);
        assert!((g.as_secs_f64() - 3.5 * 11.0 / 9600.0).abs() < 1e-9, "{g:?}");
        assert_eq!(frame_gap(38_400, Parity::Even, 1), Duration::from_micros(1750));
        assert_eq!(char_bits(Parity::None, 1), 10);
        assert_eq!(char_bits(Parity::None, 2), 11);
    }

    #[test]
    fn a_frame_with_a_wrong_checksum_is_told_from_a_good_one() {
        // Read holding 0, one register, unit 1: 01 03 00 00 00 01 84 0A. The CRC is
        // from memory, checked here by the crc16 below and by the independent one in
        // tests/support/rtu.rs through the pty tests.
        let good = [0x01, 0x03, 0x00, 0x00, 0x00, 0x01, 0x84, 0x0A];
        assert!(!ends_in_bad_crc(&good));
        let mut bad = good;
        bad[7] ^= 0x55;
        assert!(ends_in_bad_crc(&bad));
        assert!(!ends_in_bad_crc(&[0x01, 0x03]), "too short to carry a checksum");
    }
}
