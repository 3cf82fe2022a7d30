//! A small in-process MQTT 3.1.1 broker on rumqttc's packet codec, for fault injection:
//! CONNECT (with an optional login check), SUBSCRIBE with wildcards (`rumqttc::matches`),
//! PUBLISH QoS 0/1, retained messages, last wills on unclean drops, PINGREQ, session
//! takeover (a second CONNECT with a client id in use closes the first), and
//! `stop()`/`restart()` that drop every connection (a restart also forgets retained
//! messages, like a broker without persistence).

use std::collections::{BTreeMap, HashMap};
use std::net::SocketAddr;
use std::sync::{Arc, Mutex};

use bytes::{Bytes, BytesMut};
use rumqttc::{
    ConnAck, ConnectReturnCode, LastWill, Packet, PubAck, Publish, QoS, SubAck, SubscribeReasonCode, UnsubAck,
};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

const MAX_PACKET: usize = 1 << 20;

/// A message the broker received from a client.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Received {
    pub client: String,
    pub topic: String,
    pub payload: String,
    pub retain: bool,
    pub qos: u8,
}

struct Client {
    id: String,
    /// Closes this connection: a later CONNECT with the same client id takes the
    /// session over (MQTT 3.1.1 §3.1.4: the server disconnects the existing client).
    kick: CancellationToken,
    tx: mpsc::UnboundedSender<Packet>,
    subs: Vec<(String, QoS)>,
    next_pkid: u16,
}

#[derive(Default)]
struct State {
    clients: HashMap<u64, Client>,
    retained: BTreeMap<String, Publish>,
    received: Vec<Received>,
    next: u64,
    login: Option<(String, String)>,
    connects: usize,
}

/// The broker.
#[derive(Clone)]
pub struct Broker {
    pub addr: SocketAddr,
    state: Arc<Mutex<State>>,
    stop: Arc<Mutex<CancellationToken>>,
    accept: Arc<Mutex<Option<tokio::task::JoinHandle<()>>>>,
}

impl Broker {
    /// Starts on 127.0.0.1:0.
    pub async fn start() -> Broker {
        let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let b = Broker {
            addr,
            state: Arc::new(Mutex::new(State::default())),
            stop: Arc::new(Mutex::new(CancellationToken::new())),
            accept: Arc::new(Mutex::new(None)),
        };
        b.serve(listener);
        b
    }

    /// Requires this user name and password from every client.
    pub fn require_login(&self, user: &str, password: &str) {
        self.state.lock().unwrap().login = Some((user.to_owned(), password.to_owned()));
    }

    fn serve(&self, listener: TcpListener) {
        let stop = self.stop.lock().unwrap().clone();
        let b = self.clone();
        let handle = tokio::spawn(async move {
            loop {
                tokio::select! {
                    () = stop.cancelled() => return,
                    r = listener.accept() => {
                        let Ok((stream, _)) = r else { return };
                        let b = b.clone();
                        let stop = stop.clone();
                        tokio::spawn(async move { b.connection(stream, stop).await });
                    }
                }
            }
        });
        *self.accept.lock().unwrap() = Some(handle);
    }

    /// Drops every connection and stops listening (no wills: the broker is gone).
    pub fn stop(&self) {
        self.stop.lock().unwrap().cancel();
        self.state.lock().unwrap().clients.clear();
    }

    /// Stops, forgets retained messages, and listens again on the same port.
    pub async fn restart(&self) {
        self.stop();
        // The old listener must be closed before the port can be bound again.
        let handle = self.accept.lock().unwrap().take();
        if let Some(h) = handle {
            let _ = h.await;
        }
        self.state.lock().unwrap().retained.clear();
        *self.stop.lock().unwrap() = CancellationToken::new();
        let listener = TcpListener::bind(self.addr).await.unwrap();
        self.serve(listener);
    }

    /// Publishes as if a device did.
    pub fn publish(&self, topic: &str, payload: &str, retain: bool) {
        let mut p = Publish::new(topic, QoS::AtMostOnce, payload.as_bytes().to_vec());
        p.retain = retain;
        self.route(p, "test");
    }

    /// Every message received from clients so far.
    pub fn received(&self) -> Vec<Received> {
        self.state.lock().unwrap().received.clone()
    }

    /// The retained payload of a topic.
    pub fn retained(&self, topic: &str) -> Option<String> {
        let s = self.state.lock().unwrap();
        s.retained.get(topic).map(|p| String::from_utf8_lossy(&p.payload).into_owned())
    }

    /// Current subscriptions of every client.
    pub fn subscriptions(&self) -> Vec<String> {
        let s = self.state.lock().unwrap();
        let mut v: Vec<String> = s.clients.values().flat_map(|c| c.subs.iter().map(|(f, _)| f.clone())).collect();
        v.sort();
        v
    }

    /// Successful CONNECTs since start.
    pub fn connects(&self) -> usize {
        self.state.lock().unwrap().connects
    }

    fn route(&self, p: Publish, from: &str) {
        let mut s = self.state.lock().unwrap();
        s.received.push(Received {
            client: from.to_owned(),
            topic: p.topic.clone(),
            payload: String::from_utf8_lossy(&p.payload).into_owned(),
            retain: p.retain,
            qos: p.qos as u8,
        });
        if p.retain {
            if p.payload.is_empty() {
                s.retained.remove(&p.topic);
            } else {
                s.retained.insert(p.topic.clone(), p.clone());
            }
        }
        for c in s.clients.values_mut() {
            let best = c.subs.iter().filter(|(f, _)| rumqttc::matches(&p.topic, f)).map(|(_, q)| *q as u8).max();
            if let Some(q) = best {
                // Live deliveries carry retain = 0 (MQTT 3.1.1 §3.3.1.3).
                deliver(c, &p.topic, p.payload.clone(), (p.qos as u8).min(q), false);
            }
        }
    }

    async fn connection(&self, stream: TcpStream, stop: CancellationToken) {
        // No Nagle: on a paused test clock the peer's delayed ACK (real time) would
        // hold back small packets indefinitely.
        let _ = stream.set_nodelay(true);
        let (mut rd, mut wr) = stream.into_split();
        let (tx, mut rx) = mpsc::unbounded_channel::<Packet>();
        let writer = tokio::spawn(async move {
            while let Some(p) = rx.recv().await {
                let mut buf = BytesMut::new();
                if p.write(&mut buf, MAX_PACKET).is_err() || wr.write_all(&buf).await.is_err() {
                    return;
                }
            }
        });
        let mut buf = BytesMut::with_capacity(4096);
        let mut me: Option<u64> = None;
        let mut will: Option<LastWill> = None;
        let mut clean = false;
        let kick = CancellationToken::new();
        'conn: loop {
            let n = tokio::select! {
                () = stop.cancelled() => { will = None; break 'conn; }
                () = kick.cancelled() => break 'conn,
                n = rd.read_buf(&mut buf) => n,
            };
            match n {
                Ok(0) | Err(_) => break,
                Ok(_) => {}
            }
            loop {
                let packet = match Packet::read(&mut buf, MAX_PACKET) {
                    Ok(p) => p,
                    Err(rumqttc::Error::InsufficientBytes(_)) => break,
                    Err(_) => break 'conn,
                };
                match packet {
                    Packet::Connect(c) => {
                        let mut s = self.state.lock().unwrap();
                        let ok = match (&s.login, &c.login) {
                            (None, _) => true,
                            (Some((u, p)), Some(l)) => l.username == *u && l.password == *p,
                            (Some(_), None) => false,
                        };
                        if !ok {
                            let _ =
                                tx.send(Packet::ConnAck(ConnAck::new(ConnectReturnCode::BadUserNamePassword, false)));
                            break 'conn;
                        }
                        s.connects += 1;
                        for other in s.clients.values().filter(|o| o.id == c.client_id) {
                            other.kick.cancel();
                        }
                        let id = s.next;
                        s.next += 1;
                        s.clients.insert(
                            id,
                            Client {
                                id: c.client_id.clone(),
                                kick: kick.clone(),
                                tx: tx.clone(),
                                subs: Vec::new(),
                                next_pkid: 1,
                            },
                        );
                        me = Some(id);
                        will = c.last_will.clone();
                        let _ = tx.send(Packet::ConnAck(ConnAck::new(ConnectReturnCode::Success, false)));
                    }
                    Packet::Subscribe(sub) => {
                        let mut s = self.state.lock().unwrap();
                        let retained: Vec<Publish> = s.retained.values().cloned().collect();
                        let Some(c) = me.and_then(|id| s.clients.get_mut(&id)) else {
                            break 'conn;
                        };
                        let codes = sub.filters.iter().map(|f| SubscribeReasonCode::Success(f.qos)).collect();
                        let _ = c.tx.send(Packet::SubAck(SubAck::new(sub.pkid, codes)));
                        for f in &sub.filters {
                            c.subs.retain(|(p, _)| *p != f.path);
                            c.subs.push((f.path.clone(), f.qos));
                            for r in retained.iter().filter(|r| rumqttc::matches(&r.topic, &f.path)) {
                                let q = (r.qos as u8).min(f.qos as u8);
                                deliver(c, &r.topic, r.payload.clone(), q, true);
                            }
                        }
                    }
                    Packet::Unsubscribe(u) => {
                        let mut s = self.state.lock().unwrap();
                        if let Some(c) = me.and_then(|id| s.clients.get_mut(&id)) {
                            c.subs.retain(|(p, _)| !u.topics.contains(p));
                        }
                        let _ = tx.send(Packet::UnsubAck(UnsubAck::new(u.pkid)));
                    }
                    Packet::Publish(p) => {
                        if p.qos == QoS::AtLeastOnce {
                            let _ = tx.send(Packet::PubAck(PubAck::new(p.pkid)));
                        }
                        let from = {
                            let s = self.state.lock().unwrap();
                            me.and_then(|id| s.clients.get(&id)).map(|c| c.id.clone())
                        };
                        self.route(p, from.as_deref().unwrap_or("?"));
                    }
                    Packet::PingReq => {
                        let _ = tx.send(Packet::PingResp);
                    }
                    Packet::Disconnect => {
                        clean = true;
                        break 'conn;
                    }
                    _ => {}
                }
            }
        }
        if let Some(id) = me {
            self.state.lock().unwrap().clients.remove(&id);
        }
        if let (false, Some(w)) = (clean, will) {
            let mut p = Publish::from_bytes(w.topic, w.qos, w.message);
            p.retain = w.retain;
            self.route(p, "will");
        }
        drop(tx);
        let _ = writer.await;
    }
}

fn deliver(c: &mut Client, topic: &str, payload: Bytes, qos: u8, retain: bool) {
    let qos = if qos >= 1 { QoS::AtLeastOnce } else { QoS::AtMostOnce };
    let mut p = Publish::from_bytes(topic, qos, payload);
    p.retain = retain;
    if qos == QoS::AtLeastOnce {
        p.pkid = c.next_pkid;
        c.next_pkid = c.next_pkid.checked_add(1).unwrap_or(1);
    }
    let _ = c.tx.send(Packet::Publish(p));
}
