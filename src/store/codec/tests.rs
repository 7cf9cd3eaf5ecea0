use super::*;
use proptest::prelude::*;

fn row(seq: u64, time_ns: i64, volts: f64) -> ReadingRow {
    ReadingRow {
        channel_key: 7,
        seq,
        run_id: 3,
        time_ns,
        volts,
        amps: Some(-1.5),
        temp_c: None,
        cell_volts_used: volts / 2.0,
        soc_model: None,
        soc_fused: Some(0.5),
        charge_ah: 0.0,
        energy_wh: 0.0,
        flags: 4096,
        soc_counted_unclamped: Some(0.5),
    }
}

/// Every field, floats by their bits (so -0.0 and 0.0 differ).
fn bits(r: &ReadingRow) -> Vec<u64> {
    let f = |v: Option<f64>| v.map_or(u64::MAX - 1, |v| v.to_bits());
    vec![
        r.channel_key as u64,
        r.seq,
        r.run_id as u64,
        r.time_ns as u64,
        r.volts.to_bits(),
        f(r.amps),
        f(r.temp_c),
        r.cell_volts_used.to_bits(),
        f(r.soc_model),
        f(r.soc_fused),
        r.charge_ah.to_bits(),
        r.energy_wh.to_bits(),
        r.flags as u64,
        f(r.soc_counted_unclamped),
        u64::from(r.amps.is_some()) << 1 | u64::from(r.temp_c.is_some()),
    ]
}

fn assert_round_trip(rows: &[ReadingRow]) -> Vec<u8> {
    let body = encode(rows).unwrap();
    let back = decode(&body, 7).unwrap();
    assert_eq!(back.len(), rows.len());
    for (a, b) in rows.iter().zip(&back) {
        assert_eq!(bits(a), bits(b), "row {a:?} came back as {b:?}");
    }
    body
}

fn finite() -> impl Strategy<Value = f64> {
    prop_oneof![
        -1e6f64..1e6,
        Just(0.0),
        Just(-0.0),
        Just(f64::MAX),
        Just(f64::MIN_POSITIVE),
        Just(1e-300),
    ]
}

fn maybe() -> impl Strategy<Value = Option<f64>> {
    prop_oneof![Just(None), finite().prop_map(Some)]
}

prop_compose! {
    fn any_row()(
        seq in 0u64..=i64::MAX as u64,
        run_id in any::<i64>(),
        time_ns in 0i64..=i64::MAX,
        volts in finite(),
        amps in maybe(),
        temp_c in maybe(),
        cell in finite(),
        soc_model in maybe(),
        soc_fused in maybe(),
        unclamped in maybe(),
        charge in finite(),
        energy in finite(),
        flags in any::<i64>(),
    ) -> ReadingRow {
        ReadingRow {
            channel_key: 7, seq, run_id, time_ns, volts, amps, temp_c,
            cell_volts_used: cell, soc_model, soc_fused, charge_ah: charge,
            energy_wh: energy, flags, soc_counted_unclamped: unclamped,
        }
    }
}

proptest! {
    #[test]
    fn random_rows_round_trip_bit_for_bit(rows in proptest::collection::vec(any_row(), 0..200)) {
        assert_round_trip(&rows);
    }

    /// A realistic series: steady interval with jitter, slowly moving
    /// values, occasional gaps and steps.
    #[test]
    fn series_with_gaps_and_steps_round_trip(
        start in 0i64..4_000_000_000_000_000_000,
        jitter in proptest::collection::vec(-5_000i64..5_000, 1..500),
        gap_at in 0usize..500,
        step in -2.0f64..2.0,
    ) {
        let mut t = start;
        let rows: Vec<ReadingRow> = jitter.iter().enumerate().map(|(i, j)| {
            t += 100_000_000 + j + if i == gap_at { 86_400_000_000_000 } else { 0 };
            let v = 1.4 + (i as f64) * 1e-4 + if i > gap_at { step } else { 0.0 };
            row(1_000 + i as u64, t, v)
        }).collect();
        assert_round_trip(&rows);
    }

    /// Whatever the bytes, decoding answers and never panics.
    #[test]
    fn arbitrary_bytes_never_panic(body in proptest::collection::vec(any::<u8>(), 0..300)) {
        let _ = decode(&body, 1);
    }

    /// A cut body is refused, never read as fewer rows.
    #[test]
    fn truncated_bodies_are_refused(rows in proptest::collection::vec(any_row(), 1..50), cut in 0usize..1000) {
        let body = encode(&rows).unwrap();
        let cut = cut % body.len();
        prop_assert!(decode(&body[..cut], 7).is_err());
    }
}

#[test]
fn a_constant_series_costs_about_a_byte_per_reading() {
    let rows: Vec<_> = (0..4096)
        .map(|i| row(i, 1_700_000_000_000_000_000 + i as i64 * 100_000_000, 1.25))
        .collect();
    let body = assert_round_trip(&rows);
    // 13 columns, one bit each once the first row is written: 1.6 B.
    let per_reading = body.len() as f64 / rows.len() as f64;
    assert!(per_reading < 1.7, "{per_reading} B/reading");
}

#[test]
fn empty_and_single_bodies_round_trip() {
    assert_round_trip(&[]);
    assert_round_trip(&[row(0, 0, 0.0)]);
    assert_round_trip(&[row(i64::MAX as u64, i64::MAX, f64::MAX)]);
}

#[test]
fn negative_times_and_unstorable_seqs_are_refused() {
    assert_eq!(
        encode(&[row(1, -1, 1.0)]),
        Err(CodecError::NegativeTime(-1))
    );
    assert_eq!(
        encode(&[row(u64::MAX, 1, 1.0)]),
        Err(CodecError::SeqRange(u64::MAX))
    );
}

#[test]
fn corrupt_headers_are_named() {
    assert_eq!(
        decode(&[], 1),
        Err(CodecError::Truncated { row: 0, rows: 0 })
    );
    assert_eq!(decode(&[9, 0], 1), Err(CodecError::Version(9)));
    let mut huge = vec![VERSION];
    write_varint(&mut huge, MAX_ROWS as u64 + 1);
    assert_eq!(
        decode(&huge, 1),
        Err(CodecError::TooManyRows(MAX_ROWS as u64 + 1))
    );
}

#[test]
fn signed_classes_cover_every_width() {
    for v in [
        0i64,
        1,
        -1,
        63,
        -64,
        64,
        8191,
        -8192,
        1 << 23,
        -(1 << 39),
        i64::MAX,
        i64::MIN,
    ] {
        let mut w = BitWriter::with_capacity(16);
        put_signed(&mut w, v);
        let bytes = w.finish();
        assert_eq!(
            take_signed(&mut BitReader::new(&bytes)).ok(),
            Some(v),
            "{v}"
        );
    }
}
