//! Random and mutated replies through every reply parser: each returns a value or an error and
//! never panics, and what it returns is consistent with its input.
//!
//! A seeded generator keeps failures reproducible. Inputs are pure noise, noise behind a `#`
//! (to reach the block paths), and valid replies that are truncated or have bytes flipped, which
//! is what a garbled or cut-off instrument reply looks like.

use halfwave_drivers::ieee488::{parse_identity, parse_operation_complete, EventStatus};
use halfwave_drivers::scpi::block::{decode_binary_reply_into, reply_end, split_block};
use halfwave_drivers::scpi::response::{
    parse_bool, parse_error_entry, parse_integer, parse_number, parse_number_list, parse_string,
};
use halfwave_drivers::scpi::{ByteOrder, DataFormat};
use halfwave_drivers::Resource;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};

const SEEDS: [&[u8]; 8] = [
    b"#15hello\n",
    b"#210\x3F\x80\x00\x00\x3F\x80\x00\x00\x00\x00\n",
    b"#0abc\x01\n",
    b"-1.5E+09",
    b"-222,\"Data out of range\"",
    b"maker,model,serial,firmware",
    b"1.0,2.0,9.9E37,-9.91E37",
    b"TCPIP0::10.0.0.2::5025::SOCKET",
];

fn random_input(rng: &mut StdRng) -> Vec<u8> {
    match rng.random_range(0..4) {
        0 => {
            let mut bytes = vec![0u8; rng.random_range(0..64)];
            rng.fill(&mut bytes[..]);
            bytes
        }
        1 => {
            let mut bytes = vec![b'#'];
            let digits: Vec<u8> = (0..rng.random_range(0..12))
                .map(|_| b"0123456789#\n,.-E"[rng.random_range(0..16)])
                .collect();
            bytes.extend(digits);
            bytes
        }
        _ => {
            let mut bytes = SEEDS[rng.random_range(0..SEEDS.len())].to_vec();
            for _ in 0..rng.random_range(0..4) {
                if bytes.is_empty() {
                    break;
                }
                let at = rng.random_range(0..bytes.len());
                match rng.random_range(0..3) {
                    0 => bytes[at] = rng.random(),
                    1 => bytes.truncate(at),
                    _ => {
                        bytes.remove(at);
                    }
                }
            }
            bytes
        }
    }
}

#[test]
fn reply_parsers_never_panic_on_random_or_mutated_bytes() {
    let mut rng = StdRng::seed_from_u64(0x5c91_1999);
    let mut out = Vec::new();
    let mut accepted_blocks = 0usize;
    for _ in 0..50_000 {
        let bytes = random_input(&mut rng);
        let text = String::from_utf8_lossy(&bytes);

        if let Ok(v) = parse_number(&text) {
            assert!(
                !text.trim().is_empty(),
                "a number from blank input {bytes:?}"
            );
            let _ = v;
        }
        let _ = parse_integer(&text);
        let _ = parse_bool(&text);
        let _ = parse_string(&text);
        if let Ok(list) = parse_number_list(&text) {
            assert_eq!(list.len(), text.trim().split(',').count(), "{text:?}");
        }
        let _ = parse_error_entry(&text);
        if let Ok(id) = parse_identity(&text) {
            assert!(!id.manufacturer.is_empty() && !id.firmware.is_empty());
        }
        let _ = parse_operation_complete(&text);
        let _ = EventStatus::parse(&text);
        let _ = Resource::parse(&text);

        for from in [0, bytes.len() / 2, bytes.len()] {
            if let Ok(Some(end)) = reply_end(&bytes, b"\n", from) {
                assert!(end <= bytes.len() && end > 0, "{bytes:?} -> {end}");
            }
            if let Ok(Some(end)) = reply_end(&bytes, b"\r\n", from) {
                assert!(end <= bytes.len() && end > 0, "{bytes:?} -> {end}");
            }
        }
        if let Ok((payload, rest)) = split_block(&bytes) {
            assert!(payload.len() + rest.len() < bytes.len(), "{bytes:?}");
            accepted_blocks += 1;
        }
        for format in [DataFormat::Ascii, DataFormat::Real32, DataFormat::Real64] {
            for order in [ByteOrder::Normal, ByteOrder::Swapped] {
                if decode_binary_reply_into(&bytes, format, order, &mut out).is_ok() {
                    if let (Some(width), Ok((payload, _))) =
                        (format.value_width(), split_block(&bytes))
                    {
                        assert_eq!(out.len() * width, payload.len(), "{bytes:?}");
                    }
                }
            }
        }
    }
    // The mutations keep enough replies valid that the accepting paths are exercised too.
    assert!(
        accepted_blocks > 250,
        "only {accepted_blocks} blocks parsed"
    );
}
