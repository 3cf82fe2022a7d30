//! The serial side of Modbus RTU tests: an independent CRC-16/MODBUS and a small
//! responder that answers RTU frames on the master end of a pseudo-terminal pair.

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio_serial::SerialStream;

/// CRC-16/MODBUS, bit by bit: polynomial 0x8005 reflected (0xA001), initial 0xFFFF,
/// no final XOR. Written here rather than borrowed from the client's codec so the
/// check of the frames on the wire is independent of the code under test.
pub fn crc16_modbus(data: &[u8]) -> u16 {
    let mut crc: u16 = 0xFFFF;
    for &b in data {
        crc ^= u16::from(b);
        for _ in 0..8 {
            crc = if crc & 1 != 0 { (crc >> 1) ^ 0xA001 } else { crc >> 1 };
        }
    }
    crc
}

/// What the responder holds and saw.
#[derive(Debug, Default)]
pub struct Slave {
    pub unit: u8,
    pub holding: BTreeMap<u16, u16>,
    pub coils: BTreeMap<u16, bool>,
    /// Every request frame received (CRC checked), without its CRC.
    pub frames: Vec<Vec<u8>>,
    /// Frames dropped for a bad CRC.
    pub bad_crc: usize,
    /// Answer with the checksum's bytes inverted (a line at the wrong baud rate or
    /// parity garbles answers like this, as far as the master can tell).
    pub corrupt_answers: bool,
    /// Answer every request with this exception code (a gateway whose device behind it
    /// is silent answers 0x0B; a busy device 0x06).
    pub refuse_all: Option<u8>,
}

fn with_crc(mut v: Vec<u8>) -> Vec<u8> {
    let c = crc16_modbus(&v);
    v.extend_from_slice(&c.to_le_bytes());
    v
}

/// Answers fc 1, 3, 4, 5 and 6 for `slave.unit` until the port closes.
pub async fn respond(port: SerialStream, slave: Arc<Mutex<Slave>>) {
    respond_all(port, vec![slave]).await;
}

/// Several devices on one line: each frame is heard by all of them (every one records
/// it) and answered by the one whose unit it names; a unit nobody has stays silent.
pub async fn respond_all(mut port: SerialStream, slaves: Vec<Arc<Mutex<Slave>>>) {
    let mut buf: Vec<u8> = Vec::new();
    let mut chunk = [0u8; 256];
    loop {
        let Ok(n) = port.read(&mut chunk).await else {
            return;
        };
        if n == 0 {
            return;
        }
        buf.extend_from_slice(&chunk[..n]);
        while buf.len() >= 2 {
            let len = match buf[1] {
                1..=6 => 8,
                15 | 16 if buf.len() >= 7 => 9 + usize::from(buf[6]),
                15 | 16 => break,
                _ => {
                    buf.clear();
                    break;
                }
            };
            if buf.len() < len {
                break;
            }
            let frame: Vec<u8> = buf.drain(..len).collect();
            let (body, crc) = frame.split_at(len - 2);
            let crc_ok = crc16_modbus(body) == u16::from_le_bytes([crc[0], crc[1]]);
            let mut answering = None;
            for slave in &slaves {
                let mut s = slave.lock().unwrap();
                if !crc_ok {
                    s.bad_crc += 1;
                    continue;
                }
                s.frames.push(body.to_vec());
                if body[0] == s.unit {
                    answering = Some(Arc::clone(slave));
                }
            }
            let Some(slave) = answering else { continue };
            let (reply, corrupt) = {
                let mut s = slave.lock().unwrap();
                let addr = u16::from_be_bytes([body[2], body[3]]);
                let val = u16::from_be_bytes([body[4], body[5]]);
                let reply = match body[1] {
                    f if s.refuse_all.is_some() => vec![s.unit, f | 0x80, s.refuse_all.unwrap_or_default()],
                    // Input registers come from the same table here.
                    3 | 4 => {
                        let words: Option<Vec<u16>> = (0..val).map(|i| s.holding.get(&(addr + i)).copied()).collect();
                        match words {
                            Some(w) => {
                                let mut r = vec![s.unit, body[1], (w.len() * 2) as u8];
                                for x in w {
                                    r.extend_from_slice(&x.to_be_bytes());
                                }
                                r
                            }
                            None => vec![s.unit, body[1] | 0x80, 0x02],
                        }
                    }
                    1 => {
                        let bits: Vec<bool> =
                            (0..val).map(|i| s.coils.get(&(addr + i)).copied().unwrap_or(false)).collect();
                        let mut bytes = vec![0u8; bits.len().div_ceil(8)];
                        for (i, b) in bits.iter().enumerate() {
                            if *b {
                                bytes[i / 8] |= 1 << (i % 8);
                            }
                        }
                        let mut r = vec![s.unit, 1, bytes.len() as u8];
                        r.extend(bytes);
                        r
                    }
                    5 => {
                        s.coils.insert(addr, val == 0xFF00);
                        body.to_vec()
                    }
                    6 => {
                        s.holding.insert(addr, val);
                        body.to_vec()
                    }
                    f => vec![s.unit, f | 0x80, 0x01],
                };
                (reply, s.corrupt_answers)
            };
            let mut reply = with_crc(reply);
            if corrupt {
                let n = reply.len();
                reply[n - 2] ^= 0xFF;
                reply[n - 1] ^= 0xFF;
            }
            if port.write_all(&reply).await.is_err() {
                return;
            }
        }
    }
}
