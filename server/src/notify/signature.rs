//! Signing a webhook delivery: HMAC-SHA256 (RFC 2104 with SHA-256, as RFC 4231 tests it) over
//! `timestamp + "." + body`, keyed with the receiver's shared secret.
//!
//! The timestamp (Unix seconds at the attempt) is signed with the body so that a captured request
//! cannot be replayed later with a fresh timestamp: the receiver recomputes the signature, compares
//! it in constant time and refuses timestamps outside its replay window (README, "Notifications").

use hmac::{KeyInit, Mac};
use sha2::Sha256;

/// The header carrying the signature, `sha256=<64 hex digits>`.
pub const SIGNATURE_HEADER: &str = "Halfwave-Signature";
/// The header carrying the Unix time in seconds that was signed.
pub const TIMESTAMP_HEADER: &str = "Halfwave-Timestamp";
/// The header carrying the event's id (the same on every attempt; receivers de-duplicate by it).
pub const EVENT_ID_HEADER: &str = "Halfwave-Event-Id";
/// The header carrying the event type (`run.completed`, ...).
pub const EVENT_TYPE_HEADER: &str = "Halfwave-Event";

/// HMAC-SHA256 of `message` under `key`.
pub fn hmac_sha256(key: &[u8], message: &[u8]) -> [u8; 32] {
    // HMAC takes a key of any length (longer keys are hashed first), so this cannot fail.
    let mut mac = <hmac::Hmac<Sha256> as KeyInit>::new_from_slice(key)
        .unwrap_or_else(|_| unreachable!("HMAC accepts keys of any length"));
    mac.update(message);
    mac.finalize().into_bytes().into()
}

/// The value of the signature header for `body` sent at `timestamp_s`.
pub fn signature(secret: &[u8], timestamp_s: i64, body: &str) -> String {
    let mut message = Vec::with_capacity(body.len() + 24);
    message.extend_from_slice(timestamp_s.to_string().as_bytes());
    message.push(b'.');
    message.extend_from_slice(body.as_bytes());
    format!(
        "sha256={}",
        crate::api::tokens::hex(&hmac_sha256(secret, &message))
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::api::tokens::hex;

    #[test]
    fn rfc_4231_test_case_2() {
        // RFC 4231, section 4.3 (test case 2): key "Jefe", data "what do ya want for nothing?".
        assert_eq!(
            hex(&hmac_sha256(b"Jefe", b"what do ya want for nothing?")),
            "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
        );
    }

    #[test]
    fn rfc_4231_test_case_1_and_6_long_key() {
        // RFC 4231, section 4.2 (test case 1): 20 bytes of 0x0b, data "Hi There".
        assert_eq!(
            hex(&hmac_sha256(&[0x0b; 20], b"Hi There")),
            "b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"
        );
        // RFC 4231, section 4.7 (test case 6): a 131-byte key of 0xaa, hashed before use.
        assert_eq!(
            hex(&hmac_sha256(
                &[0xaa; 131],
                b"Test Using Larger Than Block-Size Key - Hash Key First"
            )),
            "60e431591ee0b67f0d8a26aacbf5b77f8e0bc6213728c5140546040f0ee37f54"
        );
    }

    #[test]
    fn the_signature_covers_timestamp_and_body() {
        let s = signature(b"Jefe", 1_700_000_000, "{}");
        assert_eq!(
            s,
            format!("sha256={}", hex(&hmac_sha256(b"Jefe", b"1700000000.{}")))
        );
        assert_ne!(s, signature(b"Jefe", 1_700_000_001, "{}"));
        assert_ne!(s, signature(b"Jefe", 1_700_000_000, "{ }"));
        assert_ne!(s, signature(b"jefe", 1_700_000_000, "{}"));
    }
}
