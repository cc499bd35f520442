//! Compact binary form of an analyzer [`Trace`], for `points.trace_encoded` and the
//! `reference_traces` table.
//!
//! A run keeps every trace it took (tens of thousands of 10,001-point sweeps a night), so the form
//! is built to be small and quick to write within the engine's per-point budget:
//! - a uniform frequency axis (what analyzers return) is stored as start and step, two numbers
//!   instead of one per point; any other axis is stored in full, so nothing is ever lost;
//! - powers are stored as `f32` (about 7 significant digits: a resolution near 4e-6 dB at -60 dBm,
//!   far below any analyzer's amplitude accuracy);
//! - the numbers are split into byte planes (all first bytes, then all second bytes, ...) before
//!   DEFLATE (pure-Rust `miniz_oxide` through `flate2`): sign and exponent bytes of neighbouring
//!   points barely change, so grouping them makes long runs the compressor removes.
//!
//! Layout (little-endian throughout):
//!
//! | bytes | content |
//! |-------|---------|
//! | 4     | magic `HWT` and format version `1` |
//! | 1     | flags: bit 0 uniform axis, bit 1 resolution bandwidth present |
//! | 4     | number of points (u32) |
//! | 16    | if uniform: axis start and step, hertz (f64, f64) |
//! | 8     | if present: resolution bandwidth, hertz (f64) |
//! | rest  | DEFLATE of the byte planes of the f32 powers, then (explicit axis only) of the f64 axis |
//!
//! Decoding never trusts the blob: every length is checked, the inflated size is capped by what
//! the header promises, and the result goes through [`Trace::new`], so a damaged blob gives a
//! [`TraceCodecError`] and never a panic.

use flate2::read::DeflateDecoder;
use flate2::write::DeflateEncoder;
use flate2::Compression;
use halfwave_units::{Hz, Trace, TraceError};
use std::io::{Read, Write};

const MAGIC: [u8; 3] = *b"HWT";
const FORMAT_VERSION: u8 = 1;
const FLAG_UNIFORM_AXIS: u8 = 0b01;
const FLAG_RESOLUTION_BANDWIDTH: u8 = 0b10;
const KNOWN_FLAGS: u8 = FLAG_UNIFORM_AXIS | FLAG_RESOLUTION_BANDWIDTH;

/// The most points a stored trace may have ([`halfwave_units::Trace::MAX_STORED_POINTS`]). Caps
/// the memory a damaged header could ask for.
pub const MAX_POINTS: usize = halfwave_units::Trace::MAX_STORED_POINTS;

/// An axis counts as uniform when every frequency lies within this fraction of one step of
/// `start + i * step`; the decoded axis then differs from the original by at most that much.
pub const UNIFORM_AXIS_TOLERANCE_STEPS: f64 = 1e-6;

/// Why a trace could not be encoded or decoded.
#[derive(Debug, thiserror::Error)]
pub enum TraceCodecError {
    #[error("the stored trace is {actual} bytes long, shorter than its {needed}-byte header; the row is damaged, re-measure the point")]
    Truncated { needed: usize, actual: usize },

    #[error("the stored trace does not start with the Halfwave trace marker; the row is damaged or was not written by Halfwave")]
    BadMagic,

    #[error("the stored trace uses format version {0}, which this build does not know; upgrade Halfwave to read it")]
    UnsupportedVersion(u8),

    #[error("the stored trace has unknown flag bits {0:#04x}; upgrade Halfwave or treat the row as damaged")]
    UnknownFlags(u8),

    #[error("the trace has {points} points, more than the {max} the store accepts")]
    TooManyPoints { points: usize, max: usize },

    #[error("power at point {index} ({value_dbm} dBm) does not fit a 32-bit float; check the analyzer's reply")]
    PowerOutOfRange { index: usize, value_dbm: f64 },

    #[error("the stored trace's compressed data is damaged ({0}); re-measure the point")]
    Compression(#[source] std::io::Error),

    #[error("the stored trace should hold {expected} bytes of samples but holds {actual}; the row is damaged, re-measure the point")]
    LengthMismatch { expected: usize, actual: usize },

    #[error("the stored trace decodes to an invalid trace: {0}; the row is damaged, re-measure the point")]
    InvalidTrace(#[source] TraceError),
}

/// Encodes a trace into the compact stored form.
pub fn encode(trace: &Trace) -> Result<Vec<u8>, TraceCodecError> {
    let frequencies = trace.frequency_hz();
    let powers = trace.power_dbm();
    let count = frequencies.len();
    if count > MAX_POINTS {
        return Err(TraceCodecError::TooManyPoints {
            points: count,
            max: MAX_POINTS,
        });
    }
    let count_u32 = u32::try_from(count).map_err(|_| TraceCodecError::TooManyPoints {
        points: count,
        max: MAX_POINTS,
    })?;

    let mut power_bytes = Vec::with_capacity(count * 4);
    for (index, &value_dbm) in powers.iter().enumerate() {
        let narrowed = value_dbm as f32;
        if !narrowed.is_finite() {
            return Err(TraceCodecError::PowerOutOfRange { index, value_dbm });
        }
        power_bytes.extend_from_slice(&narrowed.to_le_bytes());
    }

    let uniform_axis = uniform_axis(frequencies);
    let rbw = trace.resolution_bandwidth();
    let mut flags = 0u8;
    if uniform_axis.is_some() {
        flags |= FLAG_UNIFORM_AXIS;
    }
    if rbw.is_some() {
        flags |= FLAG_RESOLUTION_BANDWIDTH;
    }

    let mut out = Vec::with_capacity(64 + count * 2);
    out.extend_from_slice(&MAGIC);
    out.push(FORMAT_VERSION);
    out.push(flags);
    out.extend_from_slice(&count_u32.to_le_bytes());
    if let Some((start, step)) = uniform_axis {
        out.extend_from_slice(&start.to_le_bytes());
        out.extend_from_slice(&step.to_le_bytes());
    }
    if let Some(rbw) = rbw {
        out.extend_from_slice(&rbw.value().to_le_bytes());
    }

    let mut samples = to_byte_planes(&power_bytes, 4);
    if uniform_axis.is_none() {
        let axis_bytes: Vec<u8> = frequencies.iter().flat_map(|f| f.to_le_bytes()).collect();
        samples.extend_from_slice(&to_byte_planes(&axis_bytes, 8));
    }
    let mut encoder = DeflateEncoder::new(out, Compression::fast());
    encoder
        .write_all(&samples)
        .map_err(TraceCodecError::Compression)?;
    encoder.finish().map_err(TraceCodecError::Compression)
}

/// Decodes a stored trace. Any damage gives an error, never a panic.
pub fn decode(blob: &[u8]) -> Result<Trace, TraceCodecError> {
    let mut reader = ByteReader {
        rest: blob,
        total: blob.len(),
    };
    let magic = reader.take(4)?;
    if magic.get(..3) != Some(&MAGIC[..]) {
        return Err(TraceCodecError::BadMagic);
    }
    let version = magic.get(3).copied().unwrap_or(0);
    if version != FORMAT_VERSION {
        return Err(TraceCodecError::UnsupportedVersion(version));
    }
    let flags = reader.u8()?;
    if flags & !KNOWN_FLAGS != 0 {
        return Err(TraceCodecError::UnknownFlags(flags & !KNOWN_FLAGS));
    }
    let count = reader.u32()? as usize;
    if count > MAX_POINTS {
        return Err(TraceCodecError::TooManyPoints {
            points: count,
            max: MAX_POINTS,
        });
    }
    let uniform_axis = if flags & FLAG_UNIFORM_AXIS != 0 {
        Some((reader.f64()?, reader.f64()?))
    } else {
        None
    };
    let rbw = if flags & FLAG_RESOLUTION_BANDWIDTH != 0 {
        Some(Hz(reader.f64()?))
    } else {
        None
    };

    let axis_bytes = if uniform_axis.is_some() { 0 } else { count * 8 };
    let expected = count * 4 + axis_bytes;
    let mut samples = Vec::with_capacity(expected.min(blob.len().saturating_mul(64)));
    DeflateDecoder::new(reader.rest)
        .take(expected as u64 + 1)
        .read_to_end(&mut samples)
        .map_err(TraceCodecError::Compression)?;
    if samples.len() != expected {
        return Err(TraceCodecError::LengthMismatch {
            expected,
            actual: samples.len(),
        });
    }
    let (power_planes, axis_planes) = samples.split_at(count * 4);

    let power_dbm: Vec<f64> = from_byte_planes(power_planes, 4)
        .chunks_exact(4)
        .map(|b| f64::from(f32::from_le_bytes([b[0], b[1], b[2], b[3]])))
        .collect();
    let frequency_hz: Vec<f64> = match uniform_axis {
        Some((start, step)) => (0..count).map(|i| start + i as f64 * step).collect(),
        None => from_byte_planes(axis_planes, 8)
            .chunks_exact(8)
            .map(|b| f64::from_le_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]]))
            .collect(),
    };
    Trace::new(frequency_hz, power_dbm, rbw).map_err(TraceCodecError::InvalidTrace)
}

/// Start and step when the axis is uniform within [`UNIFORM_AXIS_TOLERANCE_STEPS`] and the
/// rebuilt axis is strictly increasing (so it decodes to a valid trace); `None` otherwise.
fn uniform_axis(frequencies: &[f64]) -> Option<(f64, f64)> {
    let (&first, &last) = (frequencies.first()?, frequencies.last()?);
    if frequencies.len() < 2 {
        return None;
    }
    let step = (last - first) / (frequencies.len() - 1) as f64;
    if !(step.is_finite() && step > 0.0) {
        return None;
    }
    let tolerance = step * UNIFORM_AXIS_TOLERANCE_STEPS;
    let mut previous = f64::NEG_INFINITY;
    for (i, &f) in frequencies.iter().enumerate() {
        let rebuilt = first + i as f64 * step;
        if (rebuilt - f).abs() > tolerance || rebuilt <= previous {
            return None;
        }
        previous = rebuilt;
    }
    Some((first, step))
}

/// Regroups little-endian values of `width` bytes so that byte k of every value comes together.
fn to_byte_planes(bytes: &[u8], width: usize) -> Vec<u8> {
    let count = bytes.len() / width;
    let mut planes = vec![0u8; count * width];
    for (i, value) in bytes.chunks_exact(width).enumerate() {
        for (k, &byte) in value.iter().enumerate() {
            planes[k * count + i] = byte;
        }
    }
    planes
}

/// Undoes [`to_byte_planes`].
fn from_byte_planes(planes: &[u8], width: usize) -> Vec<u8> {
    let count = planes.len() / width;
    let mut bytes = vec![0u8; count * width];
    for (k, plane) in planes.chunks_exact(count.max(1)).take(width).enumerate() {
        for (i, &byte) in plane.iter().enumerate() {
            bytes[i * width + k] = byte;
        }
    }
    bytes
}

/// Reads fixed-size fields off the front of a blob, failing with [`TraceCodecError::Truncated`].
struct ByteReader<'a> {
    rest: &'a [u8],
    total: usize,
}

impl<'a> ByteReader<'a> {
    fn take(&mut self, n: usize) -> Result<&'a [u8], TraceCodecError> {
        if self.rest.len() < n {
            return Err(TraceCodecError::Truncated {
                needed: self.total - self.rest.len() + n,
                actual: self.total,
            });
        }
        let (head, tail) = self.rest.split_at(n);
        self.rest = tail;
        Ok(head)
    }

    fn u8(&mut self) -> Result<u8, TraceCodecError> {
        Ok(self.take(1)?.first().copied().unwrap_or(0))
    }

    fn u32(&mut self) -> Result<u32, TraceCodecError> {
        let mut b = [0u8; 4];
        b.copy_from_slice(self.take(4)?);
        Ok(u32::from_le_bytes(b))
    }

    fn f64(&mut self) -> Result<f64, TraceCodecError> {
        let mut b = [0u8; 8];
        b.copy_from_slice(self.take(8)?);
        Ok(f64::from_le_bytes(b))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};

    /// A 10,001-point sweep like an analyzer's: a uniform axis around 193.4 THz (1550 nm) with a
    /// comb of lines on a noisy floor (invented demo data, only its shape matters here).
    fn analyzer_like_trace(points: usize, seed: u64) -> Trace {
        let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
        let start = 193.4e12 - 5e9;
        let step = 10e9 / (points - 1) as f64;
        let frequency_hz: Vec<f64> = (0..points).map(|i| start + i as f64 * step).collect();
        let power_dbm: Vec<f64> = frequency_hz
            .iter()
            .map(|f| {
                let offset = (f - 193.4e12) / 1e9;
                let nearest_line = offset.round();
                let line = -10.0 - 40.0 * (offset - nearest_line).powi(2) * 400.0;
                let floor = -70.0 + rng.random_range(-1.5..1.5);
                line.max(floor)
            })
            .collect();
        Trace::new(frequency_hz, power_dbm, Some(Hz(5e6))).expect("valid demo trace")
    }

    fn assert_same_trace(original: &Trace, decoded: &Trace, axis_tolerance_hz: f64) {
        assert_eq!(original.len(), decoded.len());
        assert_eq!(
            original.resolution_bandwidth(),
            decoded.resolution_bandwidth()
        );
        for (a, b) in original.frequency_hz().iter().zip(decoded.frequency_hz()) {
            assert!((a - b).abs() <= axis_tolerance_hz, "{a} vs {b}");
        }
        for (a, b) in original.power_dbm().iter().zip(decoded.power_dbm()) {
            // f32 keeps 24 significand bits: relative error at most 2^-24 (IEEE 754 binary32).
            assert!((a - b).abs() <= a.abs() * 2f64.powi(-24), "{a} vs {b}");
        }
    }

    #[test]
    fn uniform_axis_round_trips_as_start_and_step() {
        let trace = analyzer_like_trace(10_001, 1);
        let blob = encode(&trace).unwrap();
        assert_eq!(blob[4] & FLAG_UNIFORM_AXIS, FLAG_UNIFORM_AXIS);
        let decoded = decode(&blob).unwrap();
        let step = 1e6;
        assert_same_trace(&trace, &decoded, step * UNIFORM_AXIS_TOLERANCE_STEPS);
    }

    #[test]
    fn irregular_axis_round_trips_exactly() {
        let frequency_hz = vec![1.0e9, 1.1e9, 1.5e9, 2.75e9, 2.8e9];
        let power_dbm = vec![-50.0, -20.25, -3.5, -20.5, -49.0];
        let trace = Trace::new(frequency_hz, power_dbm, None).unwrap();
        let blob = encode(&trace).unwrap();
        assert_eq!(blob[4] & FLAG_UNIFORM_AXIS, 0);
        let decoded = decode(&blob).unwrap();
        assert_eq!(decoded.frequency_hz(), trace.frequency_hz());
        // These powers are exact in binary32, so they come back bit for bit.
        assert_eq!(decoded.power_dbm(), trace.power_dbm());
        assert_eq!(decoded.resolution_bandwidth(), None);
    }

    #[test]
    fn encoded_10001_point_trace_is_smaller_than_raw_f64() {
        let trace = analyzer_like_trace(10_001, 2);
        let raw_f64_bytes = 10_001 * 2 * 8;
        let blob = encode(&trace).unwrap();
        assert!(
            blob.len() < raw_f64_bytes / 4,
            "encoded {} bytes, raw {raw_f64_bytes}",
            blob.len()
        );
    }

    #[test]
    fn power_beyond_f32_range_is_refused() {
        let trace = Trace::new(vec![1.0, 2.0, 3.0], vec![0.0, 1e300, 0.0], None).unwrap();
        assert!(matches!(
            encode(&trace),
            Err(TraceCodecError::PowerOutOfRange { index: 1, .. })
        ));
    }

    #[test]
    fn every_truncation_is_an_error() {
        let blob = encode(&analyzer_like_trace(501, 3)).unwrap();
        for len in 0..blob.len() {
            assert!(decode(&blob[..len]).is_err(), "truncated to {len} bytes");
        }
    }

    #[test]
    fn damaged_blobs_give_errors_not_panics() {
        let mut rng = rand::rngs::StdRng::seed_from_u64(4);
        let good = encode(&analyzer_like_trace(1_001, 5)).unwrap();
        for _ in 0..2_000 {
            let mut blob = good.clone();
            let flips = rng.random_range(1..8);
            for _ in 0..flips {
                let at = rng.random_range(0..blob.len());
                blob[at] = rng.random();
            }
            // Either an error or (a flip in a power byte) a valid trace of the same length.
            if let Ok(trace) = decode(&blob) {
                assert_eq!(trace.len(), 1_001);
            }
        }
        for len in 0..200 {
            let garbage: Vec<u8> = (0..len).map(|_| rng.random()).collect();
            assert!(decode(&garbage).is_err());
        }
        // A header that promises the maximum number of points over a few bytes of data.
        let mut liar = good[..9].to_vec();
        liar[5..9].copy_from_slice(&(MAX_POINTS as u32).to_le_bytes());
        liar.extend_from_slice(&good[9..]);
        assert!(decode(&liar).is_err());
        let mut too_many = good.clone();
        too_many[5..9].copy_from_slice(&u32::MAX.to_le_bytes());
        assert!(matches!(
            decode(&too_many),
            Err(TraceCodecError::TooManyPoints { .. })
        ));
    }

    #[test]
    fn byte_planes_invert() {
        let bytes: Vec<u8> = (0..=255).collect();
        assert_eq!(from_byte_planes(&to_byte_planes(&bytes, 8), 8), bytes);
        assert_eq!(from_byte_planes(&to_byte_planes(&bytes, 4), 4), bytes);
    }
}
