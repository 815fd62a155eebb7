//! Signed link tokens (one-click unsubscribe, subscriber page) and the
//! webhook signature.
//!
//! Role: HMAC-SHA256 (RFC 2104 with SHA-256; test vectors RFC 4231) over
//! plain bytes, URL-safe base64 (RFC 4648 §5, no padding) and lower-case
//! hex. Verification is constant-time (`hmac`'s `verify_slice`); expiry is
//! checked against a passed-in `now`. No I/O, no clock.
//!
//! # Token format (v1)
//! `base64url(payload) "." base64url(mac)` where
//! `payload = "v1:" purpose ":" expiry ":" subscriber_id` (UTF-8), `purpose`
//! is `unsubscribe` or `page`, `expiry` the Unix time in seconds after which
//! the token is refused, and `mac = HMAC-SHA256(service key, payload)`. The
//! subscriber id comes last so it may contain `:`. The purpose is inside the
//! MAC, so an unsubscribe token cannot be used as a page token or the other
//! way round.
//!
//! # Webhook signature
//! Headers [`WEBHOOK_TIMESTAMP_HEADER`] (Unix seconds) and
//! [`WEBHOOK_SIGNATURE_HEADER`] = `"sha256=" hex(HMAC-SHA256(secret,
//! timestamp "." body))`, with the subscriber's own secret. The receiver
//! recomputes it over the raw body bytes and refuses old timestamps.

use base64::engine::general_purpose::URL_SAFE_NO_PAD;
use base64::Engine as _;
use chrono::{DateTime, Utc};
use hmac::{Hmac, Mac};
use sha2::Sha256;
use std::fmt;

type HmacSha256 = Hmac<Sha256>;

/// Header carrying the Unix time (seconds) the webhook body was signed at.
pub const WEBHOOK_TIMESTAMP_HEADER: &str = "Outrider-Timestamp";
/// Header carrying `sha256=<hex>`.
pub const WEBHOOK_SIGNATURE_HEADER: &str = "Outrider-Signature";
/// Header carrying the notice id; the same on every retry.
pub const WEBHOOK_IDEMPOTENCY_HEADER: &str = "Idempotency-Key";

/// Shortest service key accepted: the SHA-256 output length (RFC 2104 §3
/// advises keys no shorter than the hash output).
pub const MIN_KEY_BYTES: usize = 32;

/// Errors from building a key or checking a token or signature.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum TokenError {
    #[error("token key is {0} bytes; at least {MIN_KEY_BYTES} are needed")]
    KeyTooShort(usize),
    #[error("token is malformed")]
    Malformed,
    #[error("token signature does not match")]
    BadSignature,
    #[error("token is for {found}, not {expected}")]
    WrongPurpose { expected: Purpose, found: Purpose },
    #[error("token expired at {0}")]
    Expired(DateTime<Utc>),
    #[error("webhook timestamp is outside the allowed window")]
    StaleTimestamp,
}

/// What a token lets its bearer do.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Purpose {
    /// One-click unsubscribe (RFC 8058) for one subscriber.
    Unsubscribe,
    /// Open the subscriber's own page.
    Page,
}

impl Purpose {
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Unsubscribe => "unsubscribe",
            Self::Page => "page",
        }
    }

    fn parse(s: &str) -> Option<Self> {
        [Self::Unsubscribe, Self::Page]
            .into_iter()
            .find(|p| p.as_str() == s)
    }
}

impl fmt::Display for Purpose {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The service's token key. Its bytes never appear in `Debug` output.
#[derive(Clone)]
pub struct TokenKey(Vec<u8>);

impl TokenKey {
    pub fn new(bytes: impl Into<Vec<u8>>) -> Result<Self, TokenError> {
        let bytes = bytes.into();
        if bytes.len() < MIN_KEY_BYTES {
            return Err(TokenError::KeyTooShort(bytes.len()));
        }
        Ok(TokenKey(bytes))
    }
}

impl fmt::Debug for TokenKey {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "TokenKey({} bytes)", self.0.len())
    }
}

/// What a valid token says.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Claims {
    pub purpose: Purpose,
    pub subscriber_id: String,
    /// Refused from this instant on (whole seconds).
    pub expires_at: DateTime<Utc>,
}

/// HMAC-SHA256 of `data` under `key` (any length).
pub fn hmac_sha256(key: &[u8], data: &[u8]) -> [u8; 32] {
    let mut mac = new_mac(key);
    mac.update(data);
    mac.finalize().into_bytes().into()
}

fn new_mac(key: &[u8]) -> HmacSha256 {
    // HMAC takes keys of every length (long ones are hashed, RFC 2104 §2),
    // and the hmac crate only reports InvalidLength for fixed-key MACs.
    match HmacSha256::new_from_slice(key) {
        Ok(m) => m,
        Err(_) => unreachable!("HMAC accepts keys of any length"),
    }
}

/// Lower-case hex of `bytes`.
pub fn to_hex(bytes: &[u8]) -> String {
    const DIGITS: &[u8; 16] = b"0123456789abcdef";
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        s.push(char::from(DIGITS[usize::from(b >> 4)]));
        s.push(char::from(DIGITS[usize::from(b & 0x0f)]));
    }
    s
}

fn payload(purpose: Purpose, subscriber_id: &str, expires_at: DateTime<Utc>) -> String {
    format!(
        "v1:{}:{}:{}",
        purpose.as_str(),
        expires_at.timestamp(),
        subscriber_id
    )
}

/// A token for `purpose` and `subscriber_id`, refused from `expires_at` on
/// (sub-second parts are dropped).
pub fn sign_token(
    key: &TokenKey,
    purpose: Purpose,
    subscriber_id: &str,
    expires_at: DateTime<Utc>,
) -> String {
    let p = payload(purpose, subscriber_id, expires_at);
    let mac = hmac_sha256(&key.0, p.as_bytes());
    format!(
        "{}.{}",
        URL_SAFE_NO_PAD.encode(p),
        URL_SAFE_NO_PAD.encode(mac)
    )
}

/// Check `token` for `expected` purpose at `now`. The MAC is checked first,
/// in constant time; nothing of an unauthenticated payload is trusted.
pub fn verify_token(
    key: &TokenKey,
    token: &str,
    expected: Purpose,
    now: DateTime<Utc>,
) -> Result<Claims, TokenError> {
    let (p64, mac64) = token.trim().split_once('.').ok_or(TokenError::Malformed)?;
    let payload = URL_SAFE_NO_PAD
        .decode(p64)
        .map_err(|_| TokenError::Malformed)?;
    let mac = URL_SAFE_NO_PAD
        .decode(mac64)
        .map_err(|_| TokenError::Malformed)?;
    let mut m = new_mac(&key.0);
    m.update(&payload);
    m.verify_slice(&mac).map_err(|_| TokenError::BadSignature)?;

    let text = std::str::from_utf8(&payload).map_err(|_| TokenError::Malformed)?;
    let mut parts = text.splitn(4, ':');
    let (Some("v1"), Some(purpose), Some(expiry), Some(subscriber_id)) =
        (parts.next(), parts.next(), parts.next(), parts.next())
    else {
        return Err(TokenError::Malformed);
    };
    let purpose = Purpose::parse(purpose).ok_or(TokenError::Malformed)?;
    let expires_at = expiry
        .parse::<i64>()
        .ok()
        .and_then(|s| DateTime::<Utc>::from_timestamp(s, 0))
        .ok_or(TokenError::Malformed)?;
    if purpose != expected {
        return Err(TokenError::WrongPurpose {
            expected,
            found: purpose,
        });
    }
    if now >= expires_at {
        return Err(TokenError::Expired(expires_at));
    }
    Ok(Claims {
        purpose,
        subscriber_id: subscriber_id.to_owned(),
        expires_at,
    })
}

/// The [`WEBHOOK_SIGNATURE_HEADER`] value for `body` sent at `timestamp`
/// (Unix seconds, also sent in [`WEBHOOK_TIMESTAMP_HEADER`]).
pub fn webhook_signature(secret: &[u8], timestamp: i64, body: &[u8]) -> String {
    let mut m = new_mac(secret);
    m.update(timestamp.to_string().as_bytes());
    m.update(b".");
    m.update(body);
    format!("sha256={}", to_hex(&m.finalize().into_bytes()))
}

/// The receiver's check, as in the docs/notices.md recipe: the signature
/// matches (constant time) and `timestamp` is within `tolerance_seconds` of
/// `now`.
pub fn verify_webhook_signature(
    secret: &[u8],
    timestamp: i64,
    body: &[u8],
    header_value: &str,
    now: DateTime<Utc>,
    tolerance_seconds: i64,
) -> Result<(), TokenError> {
    let hex = header_value
        .trim()
        .strip_prefix("sha256=")
        .ok_or(TokenError::Malformed)?;
    let given = from_hex(hex).ok_or(TokenError::Malformed)?;
    let mut m = new_mac(secret);
    m.update(timestamp.to_string().as_bytes());
    m.update(b".");
    m.update(body);
    m.verify_slice(&given)
        .map_err(|_| TokenError::BadSignature)?;
    if (now.timestamp() - timestamp).abs() > tolerance_seconds {
        return Err(TokenError::StaleTimestamp);
    }
    Ok(())
}

fn from_hex(s: &str) -> Option<Vec<u8>> {
    if s.len() % 2 != 0 {
        return None;
    }
    s.as_bytes()
        .chunks(2)
        .map(|pair| {
            let hi = char::from(pair[0]).to_digit(16)?;
            let lo = char::from(pair[1]).to_digit(16)?;
            u8::try_from(hi * 16 + lo).ok()
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::notify::notice::tests::utc;
    use proptest::prelude::*;
    use sha2::Digest;

    fn key() -> TokenKey {
        TokenKey::new(*b"kellerby-basin-test-key-32-bytes").unwrap()
    }

    fn unhex(s: &str) -> Vec<u8> {
        from_hex(s).unwrap()
    }

    /// HMAC written out from its definition (RFC 2104 §2) over the sha2
    /// crate's plain SHA-256: H((K ^ opad) || H((K ^ ipad) || m)), block 64.
    /// Independent of the hmac crate.
    fn hmac_by_definition(key: &[u8], msg: &[u8]) -> [u8; 32] {
        let mut k = [0u8; 64];
        if key.len() > 64 {
            k[..32].copy_from_slice(&sha2::Sha256::digest(key));
        } else {
            k[..key.len()].copy_from_slice(key);
        }
        let mut inner = sha2::Sha256::new();
        inner.update(k.map(|b| b ^ 0x36));
        inner.update(msg);
        let mut outer = sha2::Sha256::new();
        outer.update(k.map(|b| b ^ 0x5c));
        outer.update(inner.finalize());
        outer.finalize().into()
    }

    #[test]
    fn rfc4231_test_vectors() {
        // RFC 4231 §4.2-4.8, HMAC-SHA-256 values. Recalled from memory,
        // matched against Python 3 `hmac` (OpenSSL) and against copies of
        // the RFC's vectors in several public test suites.
        let long_key = vec![0xaa; 131];
        let cases: Vec<(Vec<u8>, Vec<u8>, &str)> = vec![
            (vec![0x0b; 20], b"Hi There".to_vec(),
             "b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"),
            (b"Jefe".to_vec(), b"what do ya want for nothing?".to_vec(),
             "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"),
            (vec![0xaa; 20], vec![0xdd; 50],
             "773ea91e36800e46854db8ebd09181a72959098b3ef8c122d9635514ced565fe"),
            ((1u8..=25).collect(), vec![0xcd; 50],
             "82558a389a443c0ea4cc819899f2083a85f0faa3e578f8077a2e3ff46729665b"),
            (long_key.clone(), b"Test Using Larger Than Block-Size Key - Hash Key First".to_vec(),
             "60e431591ee0b67f0d8a26aacbf5b77f8e0bc6213728c5140546040f0ee37f54"),
            (long_key, b"This is a test using a larger than block-size key and a larger than block-size data. The key needs to be hashed before being used by the HMAC algorithm.".to_vec(),
             "9b09ffa71b942fcb27635fbcd5b0e944bfdc63644f0713938a7f51535c3a35e2"),
        ];
        for (k, d, want) in &cases {
            assert_eq!(to_hex(&hmac_sha256(k, d)), *want);
            assert_eq!(to_hex(&hmac_by_definition(k, d)), *want, "reference HMAC");
        }
        // RFC 4231 §4.6 (test case 5): output truncated to 128 bits.
        let t = hmac_sha256(&[0x0c; 20], b"Test With Truncation");
        assert_eq!(to_hex(&t[..16]), "a3b6167473100ee06e0c796c2955552b");
    }

    #[test]
    fn hex_round_trip() {
        // RFC 4648 §8 base16, lower case.
        assert_eq!(to_hex(&[0x00, 0x0f, 0xa5, 0xff]), "000fa5ff");
        assert_eq!(unhex("000FA5ff"), [0x00, 0x0f, 0xa5, 0xff]);
        assert_eq!(from_hex("abc"), None);
        assert_eq!(from_hex("zz"), None);
    }

    #[test]
    fn token_round_trip_and_documented_layout() {
        let exp = utc(2026, 1, 1, 0, 0);
        let t = sign_token(&key(), Purpose::Unsubscribe, "stonecroft", exp);
        // URL-safe alphabet of RFC 4648 §5 plus our "." separator: nothing a
        // URL path or query needs to escape.
        assert!(t
            .bytes()
            .all(|c| c.is_ascii_alphanumeric() || c == b'-' || c == b'_' || c == b'.'));
        let (p, m) = t.split_once('.').unwrap();
        // 2026-01-01T00:00:00Z is Unix 1767225600 (1735689600 for 2025-01-01
        // plus 365 days), worked by hand.
        assert_eq!(
            URL_SAFE_NO_PAD.decode(p).unwrap(),
            b"v1:unsubscribe:1767225600:stonecroft"
        );
        assert_eq!(
            URL_SAFE_NO_PAD.decode(m).unwrap(),
            hmac_by_definition(
                b"kellerby-basin-test-key-32-bytes",
                b"v1:unsubscribe:1767225600:stonecroft"
            )
        );
        let c = verify_token(&key(), &t, Purpose::Unsubscribe, utc(2025, 7, 15, 2, 0)).unwrap();
        assert_eq!(
            c,
            Claims {
                purpose: Purpose::Unsubscribe,
                subscriber_id: "stonecroft".into(),
                expires_at: exp
            }
        );
    }

    #[test]
    fn token_purpose_is_bound() {
        let exp = utc(2026, 1, 1, 0, 0);
        let now = utc(2025, 7, 15, 2, 0);
        let t = sign_token(&key(), Purpose::Unsubscribe, "stonecroft", exp);
        assert_eq!(
            verify_token(&key(), &t, Purpose::Page, now),
            Err(TokenError::WrongPurpose {
                expected: Purpose::Page,
                found: Purpose::Unsubscribe
            })
        );
        let t = sign_token(&key(), Purpose::Page, "stonecroft", exp);
        assert!(verify_token(&key(), &t, Purpose::Page, now).is_ok());
        assert!(verify_token(&key(), &t, Purpose::Unsubscribe, now).is_err());
    }

    #[test]
    fn token_expiry_is_checked_against_now() {
        let exp = utc(2026, 1, 1, 0, 0);
        let t = sign_token(&key(), Purpose::Page, "stonecroft", exp);
        let just_before = exp - chrono::Duration::seconds(1);
        assert!(verify_token(&key(), &t, Purpose::Page, just_before).is_ok());
        assert_eq!(
            verify_token(&key(), &t, Purpose::Page, exp),
            Err(TokenError::Expired(exp))
        );
    }

    #[test]
    fn forged_or_broken_tokens_are_refused() {
        let exp = utc(2026, 1, 1, 0, 0);
        let now = utc(2025, 7, 15, 2, 0);
        let t = sign_token(&key(), Purpose::Unsubscribe, "stonecroft", exp);
        let (p, m) = t.split_once('.').unwrap();

        // Another subscriber's id under the same MAC.
        let other = URL_SAFE_NO_PAD.encode("v1:unsubscribe:1767225600:wattle-downs");
        assert_eq!(
            verify_token(&key(), &format!("{other}.{m}"), Purpose::Unsubscribe, now),
            Err(TokenError::BadSignature)
        );
        // A later expiry under the same MAC.
        let later = URL_SAFE_NO_PAD.encode("v1:unsubscribe:1999999999:stonecroft");
        assert_eq!(
            verify_token(&key(), &format!("{later}.{m}"), Purpose::Unsubscribe, now),
            Err(TokenError::BadSignature)
        );
        // Another key.
        let k2 = TokenKey::new(*b"another-key-of-thirty-two-bytes!").unwrap();
        assert_eq!(
            verify_token(&k2, &t, Purpose::Unsubscribe, now),
            Err(TokenError::BadSignature)
        );
        // Truncated MAC.
        assert_eq!(
            verify_token(
                &key(),
                &format!("{p}.{}", &m[..20]),
                Purpose::Unsubscribe,
                now
            ),
            Err(TokenError::BadSignature)
        );
        for bad in ["", ".", "abc", "a.b.c", "!!!.???", &format!("{p}.")] {
            assert!(
                verify_token(&key(), bad, Purpose::Unsubscribe, now).is_err(),
                "{bad:?}"
            );
        }
        // A correctly signed payload in another layout is still malformed.
        let junk = "v2:unsubscribe:1767225600:stonecroft";
        let mac = URL_SAFE_NO_PAD.encode(hmac_sha256(
            b"kellerby-basin-test-key-32-bytes",
            junk.as_bytes(),
        ));
        let tok = format!("{}.{mac}", URL_SAFE_NO_PAD.encode(junk));
        assert_eq!(
            verify_token(&key(), &tok, Purpose::Unsubscribe, now),
            Err(TokenError::Malformed)
        );
    }

    #[test]
    fn short_keys_are_refused_and_not_printed() {
        assert_eq!(
            TokenKey::new(vec![1u8; 31]).unwrap_err(),
            TokenError::KeyTooShort(31)
        );
        assert_eq!(format!("{:?}", key()), "TokenKey(32 bytes)");
    }

    #[test]
    fn subscriber_ids_with_colons_survive() {
        let exp = utc(2026, 1, 1, 0, 0);
        let t = sign_token(&key(), Purpose::Page, "kb:coordinator:1", exp);
        let c = verify_token(&key(), &t, Purpose::Page, utc(2025, 1, 1, 0, 0)).unwrap();
        assert_eq!(c.subscriber_id, "kb:coordinator:1");
    }

    #[test]
    fn webhook_signature_worked_example() {
        // The docs/notices.md example; expected value computed with Python 3:
        //   hmac.new(b"kellerby-hook-secret", b"1752545700." + body,
        //            hashlib.sha256).hexdigest()
        let body = br#"{"noticeID":"2b65300baab149c9cfd5913a126e242d","subscriber":"stonecroft"}"#;
        let sig = webhook_signature(b"kellerby-hook-secret", 1752545700, body);
        assert_eq!(
            sig,
            "sha256=9eaadd538265355f67b1c61a6dd972d081f33bb9fced4563cc3e022f1b3a112a"
        );
        let now = DateTime::<Utc>::from_timestamp(1752545760, 0).unwrap();
        assert_eq!(
            verify_webhook_signature(b"kellerby-hook-secret", 1752545700, body, &sig, now, 300),
            Ok(())
        );
        // Another body, secret or timestamp fails; so does an old timestamp.
        let mut tampered = body.to_vec();
        tampered[20] ^= 1;
        assert_eq!(
            verify_webhook_signature(
                b"kellerby-hook-secret",
                1752545700,
                &tampered,
                &sig,
                now,
                300
            ),
            Err(TokenError::BadSignature)
        );
        assert_eq!(
            verify_webhook_signature(b"other-secret", 1752545700, body, &sig, now, 300),
            Err(TokenError::BadSignature)
        );
        assert_eq!(
            verify_webhook_signature(b"kellerby-hook-secret", 1752545701, body, &sig, now, 300),
            Err(TokenError::BadSignature)
        );
        let late = DateTime::<Utc>::from_timestamp(1752545700 + 301, 0).unwrap();
        assert_eq!(
            verify_webhook_signature(b"kellerby-hook-secret", 1752545700, body, &sig, late, 300),
            Err(TokenError::StaleTimestamp)
        );
        assert_eq!(
            verify_webhook_signature(
                b"kellerby-hook-secret",
                1752545700,
                body,
                "md5=00",
                now,
                300
            ),
            Err(TokenError::Malformed)
        );
    }

    proptest! {
        #[test]
        fn webhook_signature_is_hmac_over_timestamp_dot_body(
            secret in prop::collection::vec(any::<u8>(), 0..200),
            ts in 0i64..4_000_000_000,
            body in prop::collection::vec(any::<u8>(), 0..300),
        ) {
            let mut msg = ts.to_string().into_bytes();
            msg.push(b'.');
            msg.extend_from_slice(&body);
            let want = format!("sha256={}", to_hex(&hmac_by_definition(&secret, &msg)));
            prop_assert_eq!(webhook_signature(&secret, ts, &body), want);
        }

        #[test]
        fn tokens_round_trip(sub in "\\PC{1,40}", secs in 1i64..4_000_000_000) {
            let exp = DateTime::<Utc>::from_timestamp(secs, 0).unwrap();
            let t = sign_token(&key(), Purpose::Unsubscribe, &sub, exp);
            let before = exp - chrono::Duration::seconds(1);
            let c = verify_token(&key(), &t, Purpose::Unsubscribe, before).unwrap();
            prop_assert_eq!(c.subscriber_id, sub);
            prop_assert_eq!(c.expires_at, exp);
        }
    }
}
