//! Seeded fuzzing of the reply parsers: this module's promise is that they "return
//! [`ParseError`](super::ParseError), never panic". Valid replies of every kind are mutated
//! (bytes flipped, inserted, deleted, cut short, block lengths lied about, huge digit counts)
//! and random bytes are fed as they are; every parser must return, with an error that says
//! something when it refuses.

use super::block::{
    decode_binary_reply_into, encode_values, reply_end, split_block, ByteOrder, DataFormat,
};
use super::response::{
    parse_bool, parse_error_entry, parse_integer, parse_number, parse_number_list, parse_string,
};
use rand::{rngs::StdRng, Rng, SeedableRng};

/// Replies as instruments send them (IEEE 488.2 forms, SCPI special values, blocks).
fn valid_replies(rng: &mut StdRng) -> Vec<Vec<u8>> {
    let values: Vec<f64> = (0..rng.random_range(0..50))
        .map(|_| rng.random_range(-150.0..30.0))
        .collect();
    let mut replies: Vec<Vec<u8>> = [
        "+1.93410000000E+14\n",
        "-7.5E+01",
        "9.91E37",
        "1",
        "0\n",
        "ON",
        "\"Halfwave test instrument\"",
        "-113,\"Undefined header\"",
        "+0,\"No error\"\n",
        "1.5,2.5,-3E-3,9.9E37,NAN",
        "#0abc\n",
    ]
    .iter()
    .map(|t| t.as_bytes().to_vec())
    .collect();
    for (format, order) in [
        (DataFormat::Real32, ByteOrder::Normal),
        (DataFormat::Real32, ByteOrder::Swapped),
        (DataFormat::Real64, ByteOrder::Normal),
        (DataFormat::Ascii, ByteOrder::Normal),
    ] {
        let mut reply = encode_values(&values, format, order);
        reply.push(b'\n');
        replies.push(reply);
    }
    replies
}

/// One random change of `reply`.
fn mutated(rng: &mut StdRng, mut reply: Vec<u8>) -> Vec<u8> {
    match rng.random_range(0..7) {
        0 if !reply.is_empty() => {
            let at = rng.random_range(0..reply.len());
            reply[at] = rng.random();
        }
        1 => {
            let at = rng.random_range(0..=reply.len());
            reply.insert(at, rng.random());
        }
        2 if !reply.is_empty() => {
            reply.remove(rng.random_range(0..reply.len()));
        }
        3 => reply.truncate(rng.random_range(0..=reply.len())),
        // A block header that lies about its length or its digit count.
        4 => {
            let digits = rng.random_range(1..=9u32);
            let length: u64 = rng.random_range(0..10u64.pow(digits));
            let mut lie =
                format!("#{digits}{length:0width$}", width = digits as usize).into_bytes();
            lie.extend(reply.iter().skip_while(|b| **b != b'#').skip(2).take(64));
            reply = lie;
        }
        5 => reply = b"#9999999999".to_vec(),
        _ => reply.extend((0..rng.random_range(0..8)).map(|_| rng.random::<u8>())),
    }
    reply
}

/// Runs every parser on `bytes`; panics (failing the test) only if one of them panics or
/// refuses without saying why.
fn parse_everything(bytes: &[u8]) {
    let said = |e: super::ParseError| assert!(!e.0.is_empty(), "an empty error for {bytes:?}");
    let text = String::from_utf8_lossy(bytes);
    let text = text.trim_end();
    for result in [
        parse_number(text).map(|_| ()),
        parse_integer(text).map(|_| ()),
    ] {
        result.err().map(said);
    }
    parse_bool(text).err().map(said);
    parse_string(text).err().map(said);
    parse_number_list(text).err().map(said);
    parse_error_entry(text).err().map(said);
    for terminator in [&b"\n"[..], b"\r\n"] {
        for from in [0, bytes.len() / 2, bytes.len() + 5] {
            reply_end(bytes, terminator, from).err().map(said);
        }
    }
    split_block(bytes).err().map(said);
    let mut out = Vec::new();
    for format in [DataFormat::Real32, DataFormat::Real64, DataFormat::Ascii] {
        for order in [ByteOrder::Normal, ByteOrder::Swapped] {
            decode_binary_reply_into(bytes, format, order, &mut out)
                .err()
                .map(said);
        }
    }
}

#[test]
fn mutated_and_random_replies_never_panic_a_parser() {
    let mut rng = StdRng::seed_from_u64(4882);
    let mut cases = 0;
    for _ in 0..400 {
        for reply in valid_replies(&mut rng) {
            let mut bytes = reply;
            for _ in 0..rng.random_range(1..4) {
                bytes = mutated(&mut rng, bytes);
            }
            parse_everything(&bytes);
            cases += 1;
        }
        let noise: Vec<u8> = (0..rng.random_range(0..300))
            .map(|_| rng.random())
            .collect();
        parse_everything(&noise);
        cases += 1;
    }
    println!("{cases} replies parsed by every parser without a panic");
    assert!(cases > 5000);
}
