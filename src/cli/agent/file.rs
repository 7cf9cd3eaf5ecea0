//! A file an instrument program writes as it measures (CSV or TSV with a
//! header line): new complete lines are read each period, a partial last
//! line waits for its end, and a file that shrank or was replaced (a new
//! inode) is read again from its start. How far it was read is stored in
//! the spool with the readings it gave, so a restarted agent reads on
//! from there and never takes a line twice.

use super::spool::{FilePos, Spool, Spooled};
use super::{Source, SourceSpec, UsageError};
use std::io::{Read, Seek, SeekFrom};
use std::os::unix::fs::MetadataExt;
use std::sync::Arc;
use tokio::sync::Notify;

/// Bytes read per look at most (the rest waits for the next period).
const READ_PER_LOOK: u64 = 4 << 20;

/// How a line's time is written.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum TimeFormat {
    Iso8601,
    EpochS,
    EpochMs,
    /// Seconds since this instant (ns since 1970).
    ElapsedS(i64),
}

/// The file's layout as configured.
#[derive(Debug, Clone)]
pub(crate) struct Layout {
    time_column: String,
    time_format: TimeFormat,
    delimiter: Option<u8>,
    decimal_comma: bool,
}

impl Layout {
    pub(super) fn of(spec: &SourceSpec, at: &str) -> Result<Layout, UsageError> {
        let time = spec
            .time
            .as_ref()
            .ok_or_else(|| UsageError(format!("{at}.time: required for a file source")))?;
        let time_format = match time.format.as_str() {
            "iso8601" => TimeFormat::Iso8601,
            "epoch_s" => TimeFormat::EpochS,
            "epoch_ms" => TimeFormat::EpochMs,
            "elapsed_s" => {
                let start = time.start.as_deref().unwrap_or("");
                let ns = parse_iso(start).ok_or_else(|| {
                    UsageError(format!(
                        "{at}.time.start = {start:?}: an RFC 3339 time is required for elapsed_s"
                    ))
                })?;
                TimeFormat::ElapsedS(ns)
            }
            other => {
                return Err(UsageError(format!(
                    "{at}.time.format = {other:?}: expected iso8601, epoch_s, epoch_ms or elapsed_s"
                )));
            }
        };
        let delimiter = match spec.delimiter.as_deref() {
            None => None,
            Some(",") => Some(b','),
            Some(";") => Some(b';'),
            Some("\t") | Some("\\t") => Some(b'\t'),
            Some(other) => {
                return Err(UsageError(format!(
                    "{at}.delimiter = {other:?}: expected \",\", \";\" or \"\\t\""
                )));
            }
        };
        if spec.decimal_comma && delimiter == Some(b',') {
            return Err(UsageError(format!(
                "{at}.decimal_comma: needs a delimiter other than \",\""
            )));
        }
        Ok(Layout {
            time_column: time.column.clone(),
            time_format,
            delimiter,
            decimal_comma: spec.decimal_comma,
        })
    }
}

/// RFC 3339, or a time without an offset taken as UTC; ns since 1970.
pub(crate) fn parse_iso(text: &str) -> Option<i64> {
    let text = text.trim();
    if let Ok(t) = chrono::DateTime::parse_from_rfc3339(text) {
        return t.timestamp_nanos_opt();
    }
    for format in ["%Y-%m-%dT%H:%M:%S%.f", "%Y-%m-%d %H:%M:%S%.f"] {
        if let Ok(t) = chrono::NaiveDateTime::parse_from_str(text, format) {
            return t.and_utc().timestamp_nanos_opt();
        }
    }
    None
}

/// The columns of one header, found.
#[derive(Debug, Clone)]
struct Header {
    delimiter: u8,
    time: usize,
    volts: usize,
    amps: Option<usize>,
    temp: Option<usize>,
}

fn column(cells: &[&str], wanted: &str) -> Option<usize> {
    match wanted
        .strip_prefix('#')
        .and_then(|n| n.parse::<usize>().ok())
    {
        Some(n) if n >= 1 => (n <= cells.len()).then_some(n - 1),
        _ => cells.iter().position(|c| c.trim() == wanted),
    }
}

impl Header {
    fn of(line: &str, source: &Source, layout: &Layout) -> Result<Header, String> {
        let delimiter = layout.delimiter.unwrap_or(if line.contains('\t') {
            b'\t'
        } else if line.contains(';') {
            b';'
        } else {
            b','
        });
        let cells: Vec<&str> = line.split(delimiter as char).collect();
        let find = |wanted: &str| {
            column(&cells, wanted).ok_or_else(|| {
                format!(
                    "no column {wanted:?} in the header {}",
                    crate::cli::excerpt(line)
                )
            })
        };
        Ok(Header {
            delimiter,
            time: find(&layout.time_column)?,
            volts: find(&source.volts.0)?,
            amps: source.amps.as_ref().map(|a| find(&a.0)).transpose()?,
            temp: source.temp_c.as_ref().map(|t| find(&t.0)).transpose()?,
        })
    }

    /// One line as (time ns, volts, charge-positive amps, °C).
    fn row(
        &self,
        line: &str,
        source: &Source,
        layout: &Layout,
    ) -> Result<(i64, f64, Option<f64>, Option<f64>), String> {
        let cells: Vec<&str> = line.split(self.delimiter as char).collect();
        let cell = |i: usize| cells.get(i).map(|c| c.trim()).unwrap_or("");
        let number = |i: usize, name: &str| -> Result<f64, String> {
            let text = cell(i);
            let text = if layout.decimal_comma {
                text.replace(',', ".")
            } else {
                text.to_string()
            };
            text.parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| format!("{name} = {} is not a number", crate::cli::excerpt(cell(i))))
        };
        let time_ns = match layout.time_format {
            TimeFormat::Iso8601 => parse_iso(cell(self.time)).ok_or_else(|| {
                format!(
                    "time {} is not ISO 8601",
                    crate::cli::excerpt(cell(self.time))
                )
            })?,
            TimeFormat::EpochS => (number(self.time, "time")? * 1e9).round() as i64,
            TimeFormat::EpochMs => (number(self.time, "time")? * 1e6).round() as i64,
            TimeFormat::ElapsedS(start) => {
                start + (number(self.time, "time")? * 1e9).round() as i64
            }
        };
        let scaled = |i: usize, (_, scale, offset): &(String, f64, f64), name: &str| {
            number(i, name).map(|v| v * scale + offset)
        };
        let volts = scaled(self.volts, &source.volts, "volts")?;
        let amps = match (self.amps, &source.amps) {
            (Some(i), Some(q)) => Some(scaled(i, q, "amps")? * source.to_charge_positive),
            _ => None,
        };
        let temp_c = match (self.temp, &source.temp_c) {
            (Some(i), Some(q)) => Some(scaled(i, q, "temp_c")?),
            _ => None,
        };
        Ok((time_ns, volts, amps, temp_c))
    }
}

/// The new bytes of the file from `pos`, up to the last line end, or a
/// fresh start if it shrank or was replaced: (text, where it ends, restarted).
fn read_new(path: &str, pos: FilePos) -> std::io::Result<Option<(String, FilePos, bool)>> {
    let meta = std::fs::metadata(path)?;
    let (inode, len) = (meta.ino(), meta.len());
    let restarted = inode != pos.inode || len < pos.offset;
    let from = if restarted { 0 } else { pos.offset };
    if len == from {
        return Ok(restarted.then(|| (String::new(), FilePos { inode, offset: 0 }, true)));
    }
    let mut file = std::fs::File::open(path)?;
    file.seek(SeekFrom::Start(from))?;
    let mut bytes = Vec::new();
    file.take(READ_PER_LOOK).read_to_end(&mut bytes)?;
    // A partial last line waits for the rest of it.
    let complete = bytes.iter().rposition(|b| *b == b'\n').map_or(0, |i| i + 1);
    bytes.truncate(complete);
    let end = FilePos {
        inode,
        offset: from + complete as u64,
    };
    Ok(Some((
        String::from_utf8_lossy(&bytes).into_owned(),
        end,
        restarted,
    )))
}

/// The file's first line (its header), when reading on from the middle.
fn first_line(path: &str) -> Option<String> {
    let mut text = String::new();
    std::fs::File::open(path)
        .ok()?
        .take(64 * 1024)
        .read_to_string(&mut text)
        .ok()?;
    text.lines().next().map(str::to_string)
}

/// The readings of new lines (the first line of a file read from its
/// start is its header), numbered from `next` on; bad lines are logged.
fn readings_of(
    text: &str,
    header: &mut Option<Header>,
    source: &Source,
    layout: &Layout,
    next: &mut u64,
) -> Vec<Spooled> {
    let channel = &source.channel_id;
    let mut rows = Vec::new();
    for line in text.lines().filter(|l| !l.trim().is_empty()) {
        let Some(h) = header.as_ref() else {
            match Header::of(line, source, layout) {
                Ok(h) => *header = Some(h),
                Err(e) => tracing::warn!(channel, error = %e, "header"),
            }
            continue;
        };
        match h.row(line, source, layout) {
            Ok((time_ns, volts, amps_charge_positive, temp_c)) => {
                rows.push(Spooled {
                    seq: *next,
                    time_ns,
                    volts,
                    amps_charge_positive,
                    temp_c,
                });
                *next += 1;
            }
            Err(e) => tracing::warn!(channel, line, error = %e, "line skipped"),
        }
    }
    rows
}

/// One line of a recording read whole: its number (the header is line 1)
/// and its (time ns, volts, charge-positive amps, °C), or why not.
pub(crate) type RecordedLine = (u64, Result<(i64, f64, Option<f64>, Option<f64>), String>);

/// A recorded file read whole with a file source's layout (`import
/// --map`): every line after the header, numbered; an error if the header
/// lacks a configured column.
pub(crate) fn read_recording(text: &str, source: &Source) -> Result<Vec<RecordedLine>, String> {
    let super::Kind::File(layout) = &source.kind else {
        unreachable!("a file layout");
    };
    let mut lines = text
        .lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty());
    let Some((_, first)) = lines.next() else {
        return Ok(Vec::new());
    };
    let header = Header::of(first, source, layout)?;
    Ok(lines
        .map(|(i, line)| (i as u64 + 1, header.row(line, source, layout)))
        .collect())
}

/// Follows the file for good, spooling each new line's reading.
pub(crate) async fn follow(
    source: Source,
    spool: Arc<Spool>,
    wake: Arc<Notify>,
    known: Arc<Notify>,
) {
    let super::Kind::File(layout) = source.kind.clone() else {
        unreachable!("a file source");
    };
    let channel = source.channel_id.clone();
    let path = source.address.clone();
    let mut next = super::scpi::first_seq(&spool, &channel, &known).await;
    let mut pos = spool
        .file_pos(&channel)
        .await
        .ok()
        .flatten()
        .unwrap_or_default();
    let mut header = None;
    if pos.offset > 0 {
        header = first_line(&path).and_then(|l| Header::of(&l, &source, &layout).ok());
    }
    let mut tick = tokio::time::interval(source.period);
    loop {
        tick.tick().await;
        let (text, end, restarted) = match read_new(&path, pos) {
            Ok(Some(new)) => new,
            Ok(None) => continue,
            Err(e) => {
                tracing::warn!(channel, path, error = %e, "reading the followed file");
                continue;
            }
        };
        if restarted {
            // A file never read before (no inode kept) is simply new.
            if pos.inode == 0 {
                tracing::info!(channel, path, "following the file from its start");
            } else {
                tracing::info!(
                    channel,
                    path,
                    "the file shrank or was replaced: reading it from its start"
                );
            }
            header = None;
        }
        let lines = text.lines().filter(|l| !l.trim().is_empty()).count() as u64;
        let rows = readings_of(&text, &mut header, &source, &layout, &mut next);
        // Lines that gave no reading (a header gives none either: at most one).
        let failed =
            lines.saturating_sub(rows.len() as u64 + u64::from(restarted || pos.offset == 0));
        spool
            .read_errors_total
            .fetch_add(failed, std::sync::atomic::Ordering::Relaxed);
        match spool.append_at(&channel, &rows, next, Some(end)).await {
            Ok(_) => {
                pos = end;
                wake.notify_one();
            }
            Err(e) => {
                // Not stored: the same lines are read again next time.
                next -= rows.len() as u64;
                tracing::error!(channel, error = %e, "spool write failed");
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn times_in_each_format() {
        assert_eq!(parse_iso("1970-01-01T00:00:01Z"), Some(1_000_000_000));
        assert_eq!(parse_iso("1970-01-01T01:00:01+01:00"), Some(1_000_000_000));
        assert_eq!(parse_iso("1970-01-01 00:00:01.5"), Some(1_500_000_000));
        assert_eq!(parse_iso("yesterday"), None);
    }

    #[test]
    fn columns_by_name_or_number() {
        let cells = ["time/s", "Ewe/V", "I/mA"];
        assert_eq!(column(&cells, "I/mA"), Some(2));
        assert_eq!(column(&cells, "#1"), Some(0));
        assert_eq!(column(&cells, "#4"), None);
        assert_eq!(column(&cells, "T"), None);
    }
}
