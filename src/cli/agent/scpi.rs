//! The polled sources: a SCPI instrument over TCP (IEEE 488.2 text: a query ends in `?` and a
//! newline, the answer is one line; port 5025 is common practice). After
//! a failed or unreadable answer the instrument's error queue is read
//! (`SYST:ERR?`, the standard query) and logged; a broken connection is
//! opened again with backoff. A Modbus device (`modbus.rs`) is polled by
//! the same loop. Each reading is spooled as it is taken.

use super::Source;
use super::spool::{Spool, Spooled};
use std::sync::Arc;
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};
use tokio::net::TcpStream;
use tokio::sync::Notify;

/// Reconnect backoff bounds.
const RECONNECT_FIRST: Duration = Duration::from_millis(200);
const RECONNECT_MAX: Duration = Duration::from_secs(10);
/// Readings taken per spool write at most (a write is an fsync).
const SPOOL_EVERY: Duration = Duration::from_millis(100);

/// A number as SCPI instruments write them (`+1.23456E+00`, `0.5`).
pub(crate) fn parse_number(reply: &str) -> Option<f64> {
    let v: f64 = reply.trim().parse().ok()?;
    // 9.9E37 is SCPI's "not a number" / overload value.
    (v.is_finite() && v.abs() < 9.9e37).then_some(v)
}

/// One instrument connection.
struct Instrument {
    source: Source,
    conn: Option<BufReader<TcpStream>>,
}

impl Instrument {
    async fn query(&mut self, q: &str) -> Result<String, String> {
        let timeout = self.source.timeout;
        let conn = match &mut self.conn {
            Some(c) => c,
            None => {
                let stream =
                    tokio::time::timeout(timeout, TcpStream::connect(&self.source.address))
                        .await
                        .map_err(|_| format!("connect {}: timed out", self.source.address))?
                        .map_err(|e| format!("connect {}: {e}", self.source.address))?;
                let _ = stream.set_nodelay(true);
                self.conn.insert(BufReader::new(stream))
            }
        };
        let exchange = async {
            conn.get_mut()
                .write_all(format!("{q}\n").as_bytes())
                .await?;
            let mut line = String::new();
            let n = conn.read_line(&mut line).await?;
            if n == 0 {
                return Err(std::io::Error::new(
                    std::io::ErrorKind::UnexpectedEof,
                    "connection closed",
                ));
            }
            Ok(line)
        };
        match tokio::time::timeout(timeout, exchange).await {
            Ok(Ok(line)) => Ok(line.trim().to_string()),
            Ok(Err(e)) => {
                self.conn = None;
                Err(format!("{q}: {e}"))
            }
            Err(_) => {
                // A late answer would be read as the next query's.
                self.conn = None;
                Err(format!("{q}: no answer within {} ms", timeout.as_millis()))
            }
        }
    }

    /// A number from `q`, scaled; on a reply that is not one, the
    /// instrument's own error text is logged.
    async fn number(&mut self, (q, scale, offset): &(String, f64, f64)) -> Result<f64, String> {
        let reply = self.query(q).await?;
        match parse_number(&reply) {
            Some(v) => Ok(v * scale + offset),
            None => {
                let error = self.query("SYST:ERR?").await.unwrap_or_else(|e| e);
                Err(format!(
                    "{q} answered {reply:?}; instrument error queue: {error}"
                ))
            }
        }
    }

    /// One reading: volts, and amps and °C where configured.
    async fn read(&mut self) -> Result<(f64, Option<f64>, Option<f64>), String> {
        let volts = self.number(&self.source.volts.clone()).await?;
        let amps = match self.source.amps.clone() {
            Some(q) => Some(self.number(&q).await? * self.source.to_charge_positive),
            None => None,
        };
        let temp_c = match self.source.temp_c.clone() {
            Some(q) => Some(self.number(&q).await?),
            None => None,
        };
        Ok((volts, amps, temp_c))
    }
}

/// Where the channel's seqs go on: the spool's record, or (a new spool)
/// what the uplink learns from the server; measuring waits for it, so a
/// new spool never reuses a seq the server has.
pub(super) async fn first_seq(spool: &Spool, channel: &str, known: &Notify) -> u64 {
    loop {
        match spool.next_seq(channel).await {
            Ok(Some(n)) => break n,
            Ok(None) => {
                tracing::info!(
                    channel,
                    "waiting for the server to say where this channel's seqs go on"
                );
                known.notified().await;
            }
            Err(e) => {
                tracing::error!(channel, error = %e, "reading the spool");
                tokio::time::sleep(RECONNECT_MAX).await;
            }
        }
    }
}

/// What a polled source reads through.
enum Probe {
    Scpi(Box<Instrument>),
    Modbus(super::modbus::Device),
}

impl Probe {
    fn of(source: &Source) -> Probe {
        match &source.kind {
            super::Kind::Modbus { unit_id, .. } => Probe::Modbus(super::modbus::Device::new(
                source.address.clone(),
                *unit_id,
                source.timeout,
            )),
            _ => Probe::Scpi(Box::new(Instrument {
                conn: None,
                source: source.clone(),
            })),
        }
    }

    fn connected(&self) -> bool {
        match self {
            Probe::Scpi(i) => i.conn.is_some(),
            Probe::Modbus(d) => d.connected(),
        }
    }

    /// Volts, charge-positive amps and °C, each in its unit.
    async fn read(&mut self, source: &Source) -> Result<(f64, Option<f64>, Option<f64>), String> {
        match self {
            Probe::Scpi(i) => i.read().await,
            Probe::Modbus(d) => {
                let super::Kind::Modbus {
                    volts,
                    amps,
                    temp_c,
                    ..
                } = &source.kind
                else {
                    unreachable!("a modbus probe has a modbus source");
                };
                let unit = |(_, scale, offset): &(String, f64, f64), raw: f64| raw * scale + offset;
                let v = unit(&source.volts, d.read(volts).await?);
                let a = match (amps, &source.amps) {
                    (Some(r), Some(u)) => {
                        Some(unit(u, d.read(r).await?) * source.to_charge_positive)
                    }
                    _ => None,
                };
                let t = match (temp_c, &source.temp_c) {
                    (Some(r), Some(u)) => Some(unit(u, d.read(r).await?)),
                    _ => None,
                };
                Ok((v, a, t))
            }
        }
    }
}

/// Polls the instrument on its period into the spool, for good.
pub(crate) async fn sample(
    source: Source,
    spool: Arc<Spool>,
    wake: Arc<Notify>,
    known: Arc<Notify>,
) {
    let channel = source.channel_id.clone();
    let mut next = first_seq(&spool, &channel, &known).await;
    let mut tick = tokio::time::interval(source.period);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let mut probe = Probe::of(&source);
    let mut backoff = RECONNECT_FIRST;
    let mut taken: Vec<Spooled> = Vec::new();
    let mut last_write = tokio::time::Instant::now();
    loop {
        tick.tick().await;
        match probe.read(&source).await {
            Ok((volts, amps_charge_positive, temp_c)) => {
                backoff = RECONNECT_FIRST;
                taken.push(Spooled {
                    seq: next,
                    time_ns: gibbsline::ingest::now_ns(),
                    volts,
                    amps_charge_positive,
                    temp_c,
                });
                next += 1;
            }
            Err(e) => {
                tracing::warn!(channel, error = %e, "instrument read failed");
                spool
                    .read_errors_total
                    .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                if !probe.connected() {
                    tokio::time::sleep(backoff).await;
                    backoff = (backoff * 2).min(RECONNECT_MAX);
                }
            }
        }
        if !taken.is_empty() && last_write.elapsed() >= SPOOL_EVERY {
            match spool.append(&channel, &taken, next).await {
                Ok(dropped) => {
                    if dropped > 0 {
                        tracing::warn!(channel, dropped, "spool full: oldest readings dropped");
                    }
                    taken.clear();
                    last_write = tokio::time::Instant::now();
                    wake.notify_one();
                }
                Err(e) => {
                    tracing::error!(channel, error = %e, "spool write failed; kept in memory, retried")
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::parse_number;

    #[test]
    fn scpi_numbers_and_the_overload_value() {
        assert_eq!(parse_number("+1.23456E+00\n"), Some(1.23456));
        assert_eq!(parse_number(" -2.5e-3 "), Some(-0.0025));
        assert_eq!(parse_number("9.9E37"), None);
        assert_eq!(parse_number("-113,\"Undefined header\""), None);
    }
}
