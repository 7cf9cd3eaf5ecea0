//! The chunk format: a run of one channel's readings as one compressed
//! byte string, losslessly (every float comes back bit for bit).
//!
//! Pure: no SQL, no I/O. Rows are written one after another into one bit
//! stream, each column against its own previous value:
//!
//! - integers (seq, time) by delta-of-delta: a reading every 100 ms with a
//!   steady clock costs one bit per column; clock jitter of a few
//!   microseconds costs 24 bits;
//! - run id and flags as "same as before" (one bit) or the change;
//! - floats by XOR with the previous value, with the leading/trailing zero
//!   window of the Gorilla method (Pelkonen et al., "Gorilla: a fast,
//!   scalable, in-memory time series database", VLDB 2015, section 4.1.2);
//!   a value some readings lack costs one bit while it stays absent or
//!   unchanged. Each column of each body is predicted either by its
//!   previous value (Gorilla) or by the line through its two previous
//!   values, whichever codes that body in fewer bits (two bytes of the
//!   header say which): counters and states of charge under steady current
//!   cost a few bits a reading that way instead of forty.
//!
//! Decoding refuses anything it cannot read whole (truncated, unknown
//! version, impossible window) with [`CodecError`]; it never panics on
//! arbitrary bytes (`tests` feed it corrupt bodies).

use super::ReadingRow;

/// The format's version byte, first in every body.
const VERSION: u8 = 1;

/// The most rows one body may hold; a body claiming more is corrupt.
pub const MAX_ROWS: usize = 1 << 20;

/// Why a body or a row could not be coded.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum CodecError {
    #[error("chunk body ends inside row {row} of {rows}")]
    Truncated { row: usize, rows: usize },
    #[error("chunk body has version {0}, this build reads {VERSION}")]
    Version(u8),
    #[error("chunk body claims {0} rows, more than {MAX_ROWS}")]
    TooManyRows(u64),
    #[error("chunk body holds an impossible float window in row {0}")]
    Window(usize),
    #[error("time_unix_ns = {0}: a stored reading's time is not negative")]
    NegativeTime(i64),
    #[error("seq = {0}: beyond the stored range")]
    SeqRange(u64),
}

/// Encodes `rows` (one channel's, any order) into one body.
pub fn encode(rows: &[ReadingRow]) -> Result<Vec<u8>, CodecError> {
    let mut w = BitWriter::with_capacity(16 + rows.len() * 24);
    w.bytes.push(VERSION);
    write_varint(&mut w.bytes, rows.len() as u64);
    let linear = choose_linear(rows);
    w.bytes.extend_from_slice(&linear.to_le_bytes());
    let mut state = RowState::new(linear);
    for r in rows {
        if r.time_ns < 0 {
            return Err(CodecError::NegativeTime(r.time_ns));
        }
        if r.seq > i64::MAX as u64 {
            return Err(CodecError::SeqRange(r.seq));
        }
        state.put(&mut w, r);
    }
    Ok(w.finish())
}

/// Decodes a body into rows of channel `channel_key`, appended to `out`.
pub fn decode_into(
    body: &[u8],
    channel_key: i64,
    out: &mut Vec<ReadingRow>,
) -> Result<(), CodecError> {
    let (&version, rest) = body
        .split_first()
        .ok_or(CodecError::Truncated { row: 0, rows: 0 })?;
    if version != VERSION {
        return Err(CodecError::Version(version));
    }
    let (n, used) = read_varint(rest).ok_or(CodecError::Truncated { row: 0, rows: 0 })?;
    if n > MAX_ROWS as u64 {
        return Err(CodecError::TooManyRows(n));
    }
    let rows = n as usize;
    let rest = &rest[used..];
    let Some((modes, rest)) = rest.split_first_chunk::<2>() else {
        return Err(CodecError::Truncated { row: 0, rows });
    };
    let mut r = BitReader::new(rest);
    let mut state = RowState::new(u16::from_le_bytes(*modes));
    out.reserve(rows);
    for row in 0..rows {
        let reading = state
            .take(&mut r, channel_key)
            .map_err(|fault| fault.at(row, rows))?;
        out.push(reading);
    }
    Ok(())
}

/// Decodes a body into rows of channel `channel_key`.
pub fn decode(body: &[u8], channel_key: i64) -> Result<Vec<ReadingRow>, CodecError> {
    let mut out = Vec::new();
    decode_into(body, channel_key, &mut out)?;
    Ok(out)
}

/// What went wrong inside one row, before the row number is known.
enum RowFault {
    Truncated,
    Window,
}

impl RowFault {
    fn at(self, row: usize, rows: usize) -> CodecError {
        match self {
            RowFault::Truncated => CodecError::Truncated { row, rows },
            RowFault::Window => CodecError::Window(row),
        }
    }
}

/// Every column's previous value: the coder and the decoder keep the same.
struct RowState {
    seq: DeltaOfDelta,
    time_ns: DeltaOfDelta,
    run_id: Repeat,
    flags: Repeat,
    volts: Xor,
    amps: MaybeXor,
    temp_c: MaybeXor,
    cell_volts_used: Xor,
    soc_model: MaybeXor,
    soc_fused: MaybeXor,
    soc_counted_unclamped: MaybeXor,
    charge_ah: Xor,
    energy_wh: Xor,
}

impl RowState {
    /// Fresh state, float column i predicted by its line where bit i of
    /// `linear` is set.
    fn new(linear: u16) -> RowState {
        let line = |i: usize| linear & (1 << i) != 0;
        RowState {
            seq: DeltaOfDelta::default(),
            time_ns: DeltaOfDelta::default(),
            run_id: Repeat::default(),
            flags: Repeat::default(),
            volts: Xor::new(line(0)),
            amps: MaybeXor::new(line(1)),
            temp_c: MaybeXor::new(line(2)),
            cell_volts_used: Xor::new(line(3)),
            soc_model: MaybeXor::new(line(4)),
            soc_fused: MaybeXor::new(line(5)),
            soc_counted_unclamped: MaybeXor::new(line(6)),
            charge_ah: Xor::new(line(7)),
            energy_wh: Xor::new(line(8)),
        }
    }

    fn put(&mut self, w: &mut BitWriter, r: &ReadingRow) {
        self.seq.put(w, r.seq as i64);
        self.time_ns.put(w, r.time_ns);
        self.run_id.put(w, r.run_id);
        self.flags.put(w, r.flags);
        self.volts.put(w, r.volts);
        self.amps.put(w, r.amps);
        self.temp_c.put(w, r.temp_c);
        self.cell_volts_used.put(w, r.cell_volts_used);
        self.soc_model.put(w, r.soc_model);
        self.soc_fused.put(w, r.soc_fused);
        self.soc_counted_unclamped.put(w, r.soc_counted_unclamped);
        self.charge_ah.put(w, r.charge_ah);
        self.energy_wh.put(w, r.energy_wh);
    }

    fn take(&mut self, r: &mut BitReader, channel_key: i64) -> Result<ReadingRow, RowFault> {
        let seq = self.seq.take(r)?;
        let time_ns = self.time_ns.take(r)?;
        let run_id = self.run_id.take(r)?;
        let flags = self.flags.take(r)?;
        Ok(ReadingRow {
            channel_key,
            seq: seq as u64,
            run_id,
            time_ns,
            volts: self.volts.take(r)?,
            amps: self.amps.take(r)?,
            temp_c: self.temp_c.take(r)?,
            cell_volts_used: self.cell_volts_used.take(r)?,
            soc_model: self.soc_model.take(r)?,
            soc_fused: self.soc_fused.take(r)?,
            soc_counted_unclamped: self.soc_counted_unclamped.take(r)?,
            charge_ah: self.charge_ah.take(r)?,
            energy_wh: self.energy_wh.take(r)?,
            flags,
        })
    }
}

/// An integer column by delta-of-delta.
#[derive(Default)]
struct DeltaOfDelta {
    prev: i64,
    delta: i64,
}

impl DeltaOfDelta {
    fn put(&mut self, w: &mut BitWriter, v: i64) {
        let delta = v.wrapping_sub(self.prev);
        put_signed(w, delta.wrapping_sub(self.delta));
        (self.prev, self.delta) = (v, delta);
    }

    #[inline(always)]
    fn take(&mut self, r: &mut BitReader) -> Result<i64, RowFault> {
        let delta = self.delta.wrapping_add(take_signed(r)?);
        let v = self.prev.wrapping_add(delta);
        (self.prev, self.delta) = (v, delta);
        Ok(v)
    }
}

/// An integer column that seldom changes: one bit while it stays.
#[derive(Default)]
struct Repeat {
    prev: i64,
}

impl Repeat {
    fn put(&mut self, w: &mut BitWriter, v: i64) {
        if v == self.prev {
            w.put(0, 1);
        } else {
            w.put(1, 1);
            put_signed(w, v.wrapping_sub(self.prev));
            self.prev = v;
        }
    }

    #[inline(always)]
    fn take(&mut self, r: &mut BitReader) -> Result<i64, RowFault> {
        let changed = r.peek() >> 63 == 1;
        r.skip(1)?;
        if changed {
            self.prev = self.prev.wrapping_add(take_signed(r)?);
        }
        Ok(self.prev)
    }
}

/// Signed integers by size class: `0` for zero, then prefixes of one more
/// `1` for each wider class. Classes fit time jitter in nanoseconds.
const CLASSES: [u32; 5] = [7, 14, 24, 40, 64];

fn put_signed(w: &mut BitWriter, v: i64) {
    let z = ((v << 1) ^ (v >> 63)) as u64;
    if z == 0 {
        w.put(0, 1);
        return;
    }
    for (i, &bits) in CLASSES.iter().enumerate() {
        if bits == 64 || z < (1u64 << bits) {
            let last = i == CLASSES.len() - 1;
            // i + 1 ones, then a zero unless this is the widest class.
            let ones = i as u32 + 1;
            w.put((1u64 << ones) - 1, ones);
            if !last {
                w.put(0, 1);
            }
            w.put(z, bits);
            return;
        }
    }
}

#[inline(always)]
fn take_signed(r: &mut BitReader) -> Result<i64, RowFault> {
    // The class prefix is read from one window: leading ones, at most
    // five, then a zero unless five.
    let window = r.peek();
    let ones = (window.leading_ones() as usize).min(CLASSES.len());
    if ones == 0 {
        r.skip(1)?;
        return Ok(0);
    }
    let prefix = ones as u32 + u32::from(ones < CLASSES.len());
    let bits = CLASSES[ones - 1];
    let z = if prefix + bits <= BitReader::WINDOW_BITS {
        r.skip(prefix + bits)?;
        (window << prefix) >> (64 - bits)
    } else {
        r.skip(prefix)?;
        r.take(bits)?
    };
    Ok(((z >> 1) as i64) ^ -((z & 1) as i64))
}

/// Where coded bits go: the body, or a count of them (to choose a
/// column's predictor).
trait Sink {
    /// Writes the low `n` bits of `v` (n ≤ 64).
    fn put(&mut self, v: u64, n: u32);
}

/// Counts bits instead of keeping them.
#[derive(Default)]
struct Counter(u64);

impl Sink for Counter {
    fn put(&mut self, _: u64, n: u32) {
        self.0 += u64::from(n);
    }
}

/// A float column by XOR with a prediction: the previous value, or (in
/// `linear` mode) the line through the two before it. A counter or a
/// state of charge under steady current moves by nearly the same step
/// each reading: against the line, only its last bits differ.
#[derive(Default)]
struct Xor {
    linear: bool,
    prev: u64,
    /// The value before `prev`.
    prev2: f64,
    /// The window of meaningful bits of the last written XOR: leading
    /// zeros and length; length 0 means none yet.
    lead: u32,
    len: u32,
}

impl Xor {
    fn new(linear: bool) -> Xor {
        Xor {
            linear,
            ..Xor::default()
        }
    }

    #[inline(always)]
    fn predicted(&self) -> u64 {
        if !self.linear {
            return self.prev;
        }
        let last = f64::from_bits(self.prev);
        let p = last + (last - self.prev2);
        if p.is_finite() {
            p.to_bits()
        } else {
            self.prev
        }
    }

    #[inline(always)]
    fn step(&mut self, bits: u64) {
        self.prev2 = f64::from_bits(self.prev);
        self.prev = bits;
    }

    fn put(&mut self, w: &mut impl Sink, v: f64) {
        let bits = v.to_bits();
        let x = bits ^ self.predicted();
        self.step(bits);
        if x == 0 {
            w.put(0, 1);
            return;
        }
        let lead = x.leading_zeros().min(63);
        let trail = x.trailing_zeros();
        if self.len > 0 && lead >= self.lead && trail >= 64 - self.lead - self.len {
            w.put(0b10, 2);
            w.put(x >> (64 - self.lead - self.len), self.len);
        } else {
            let len = 64 - lead - trail;
            w.put(0b11, 2);
            w.put(u64::from(lead), 6);
            w.put(u64::from(len - 1), 6);
            w.put(x >> trail, len);
            (self.lead, self.len) = (lead, len);
        }
    }

    #[inline(always)]
    fn take(&mut self, r: &mut BitReader) -> Result<f64, RowFault> {
        let mut bits = self.predicted();
        // Control bits and, when they fit, the XOR too from one window:
        // `0` same as predicted; `10` + the last window's bits; `11`, lead
        // (6 bits), length − 1 (6 bits), then the bits.
        let window = r.peek();
        if window >> 63 == 1 {
            let header = if window >> 62 & 1 == 1 {
                let lead = (window >> 56 & 63) as u32;
                let len = (window >> 50 & 63) as u32 + 1;
                if lead + len > 64 {
                    return Err(RowFault::Window);
                }
                (self.lead, self.len) = (lead, len);
                14
            } else if self.len == 0 {
                return Err(RowFault::Window);
            } else {
                2
            };
            let x = if header + self.len <= BitReader::WINDOW_BITS {
                r.skip(header + self.len)?;
                (window << header) >> (64 - self.len)
            } else {
                r.skip(header)?;
                r.take(self.len)?
            };
            bits ^= x << (64 - self.lead - self.len);
        } else {
            r.skip(1)?;
        }
        self.step(bits);
        Ok(f64::from_bits(bits))
    }
}

/// A float column some readings lack: one bit when nothing changed
/// (still absent, or present with the same value); otherwise a second
/// bit for whether presence flipped, then the value (when present) by XOR
/// against the prediction from the last present ones.
#[derive(Default)]
struct MaybeXor {
    present: bool,
    xor: Xor,
}

impl MaybeXor {
    fn new(linear: bool) -> MaybeXor {
        MaybeXor {
            present: false,
            xor: Xor::new(linear),
        }
    }

    fn put(&mut self, w: &mut impl Sink, v: Option<f64>) {
        let same = match v {
            None => !self.present,
            Some(v) => self.present && v.to_bits() == self.xor.prev,
        };
        if same {
            w.put(0, 1);
            return;
        }
        w.put(1, 1);
        w.put(u64::from(v.is_some() != self.present), 1);
        self.present = v.is_some();
        if let Some(v) = v {
            self.xor.put(w, v);
        }
    }

    #[inline(always)]
    fn take(&mut self, r: &mut BitReader) -> Result<Option<f64>, RowFault> {
        let window = r.peek();
        if window >> 63 == 1 {
            r.skip(2)?;
            if window >> 62 & 1 == 1 {
                self.present = !self.present;
            }
            if self.present {
                self.xor.take(r)?;
            }
        } else {
            r.skip(1)?;
        }
        Ok(self.present.then(|| f64::from_bits(self.xor.prev)))
    }
}

/// The float columns in the order [`RowState`] codes them.
const FLOAT_COLUMNS: usize = 9;

fn float_column(r: &ReadingRow, i: usize) -> Option<f64> {
    match i {
        0 => Some(r.volts),
        1 => r.amps,
        2 => r.temp_c,
        3 => Some(r.cell_volts_used),
        4 => r.soc_model,
        5 => r.soc_fused,
        6 => r.soc_counted_unclamped,
        7 => Some(r.charge_ah),
        _ => Some(r.energy_wh),
    }
}

/// For each float column (bit i), whether the line predicts `rows`
/// better than the previous value: both are counted, the cheaper kept.
fn choose_linear(rows: &[ReadingRow]) -> u16 {
    let cost = |i: usize, linear: bool| {
        let mut count = Counter::default();
        let mut x = MaybeXor::new(linear);
        for r in rows {
            x.put(&mut count, float_column(r, i));
        }
        count.0
    };
    (0..FLOAT_COLUMNS)
        .filter(|&i| cost(i, true) < cost(i, false))
        .fold(0, |mask, i| mask | 1 << i)
}

/// Bits written most significant first.
struct BitWriter {
    bytes: Vec<u8>,
    acc: u64,
    /// Bits held in `acc` (fewer than 8 between calls).
    held: u32,
}

impl Sink for BitWriter {
    fn put(&mut self, v: u64, n: u32) {
        BitWriter::put(self, v, n);
    }
}

impl BitWriter {
    fn with_capacity(n: usize) -> BitWriter {
        BitWriter {
            bytes: Vec::with_capacity(n),
            acc: 0,
            held: 0,
        }
    }

    /// Writes the low `n` bits of `v` (n ≤ 64).
    fn put(&mut self, v: u64, n: u32) {
        if n == 0 {
            return;
        }
        if n > 32 {
            self.put(v >> 32, n - 32);
            self.put(v & 0xffff_ffff, 32);
            return;
        }
        let v = v & ((1u64 << n) - 1);
        self.acc = (self.acc << n) | v;
        self.held += n;
        while self.held >= 8 {
            self.held -= 8;
            self.bytes.push((self.acc >> self.held) as u8);
        }
        self.acc &= (1u64 << self.held) - 1;
    }

    fn finish(mut self) -> Vec<u8> {
        if self.held > 0 {
            let pad = 8 - self.held;
            self.put(0, pad);
        }
        self.bytes
    }
}

struct BitReader<'a> {
    bytes: &'a [u8],
    /// Position in bits.
    pos: usize,
}

impl<'a> BitReader<'a> {
    fn new(bytes: &'a [u8]) -> BitReader<'a> {
        BitReader { bytes, pos: 0 }
    }

    /// Bits a [`peek`](Self::peek) always holds (past the end: zeros).
    const WINDOW_BITS: u32 = 57;

    /// The next 64 bits, left-aligned, without consuming them: the first
    /// 57 are the stream's (zeros past its end, which `skip` refuses).
    /// Away from the end, one unaligned load: a copy of a variable length
    /// (a call to memmove) per value was a third of decoding's time.
    #[inline(always)]
    fn peek(&self) -> u64 {
        let first = self.pos / 8;
        let window = match self.bytes.get(first..first + 8) {
            Some(eight) => u64::from_be_bytes(eight.try_into().expect("eight bytes")),
            None => {
                let mut window = [0u8; 8];
                let avail = self.bytes.len().saturating_sub(first);
                window[..avail].copy_from_slice(&self.bytes[first.min(self.bytes.len())..]);
                u64::from_be_bytes(window)
            }
        };
        window << (self.pos % 8)
    }

    /// Consumes `n` bits a `peek` showed; refused past the end.
    #[inline(always)]
    fn skip(&mut self, n: u32) -> Result<(), RowFault> {
        let end = self.pos + n as usize;
        if end > self.bytes.len() * 8 {
            return Err(RowFault::Truncated);
        }
        self.pos = end;
        Ok(())
    }

    /// Reads `n` bits (n ≤ 64).
    #[inline(always)]
    fn take(&mut self, n: u32) -> Result<u64, RowFault> {
        if n == 0 {
            return Ok(0);
        }
        if n <= Self::WINDOW_BITS {
            let window = self.peek();
            self.skip(n)?;
            return Ok(window >> (64 - n));
        }
        // Wider than a window: two, without recursion (so it inlines).
        let high_bits = n - 32;
        let high = self.peek() >> (64 - high_bits);
        self.skip(high_bits)?;
        let low = self.peek() >> 32;
        self.skip(32)?;
        Ok((high << 32) | low)
    }
}

fn write_varint(out: &mut Vec<u8>, mut v: u64) {
    while v >= 0x80 {
        out.push((v as u8) | 0x80);
        v >>= 7;
    }
    out.push(v as u8);
}

/// The value and the bytes it took; none when truncated or overlong.
fn read_varint(bytes: &[u8]) -> Option<(u64, usize)> {
    let mut v = 0u64;
    for (i, &b) in bytes.iter().enumerate().take(10) {
        v |= u64::from(b & 0x7f) << (7 * i);
        if b & 0x80 == 0 {
            return Some((v, i + 1));
        }
    }
    None
}

#[cfg(test)]
mod tests;
