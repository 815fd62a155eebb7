//! Who may see what (pure). Two kinds of page:
//! - **public**: `/healthz`, `/readyz`, `/unsubscribe/<token>` and a
//!   subscriber's own page `/my/<token>` (signed links: the token is the
//!   key). Always served.
//! - **coordinator**: everything else (overview, sites, notices, rejected
//!   messages, subscribers, the JSON API, `/metrics`).
//!
//! The coordinator's pages follow the listen address and the admin token:
//!
//! | listen | `admin_token_env` | coordinator's pages |
//! |---|---|---|
//! | loopback | not set | open (the demo; only this machine can connect) |
//! | any | set | need `Authorization: Bearer <token>` |
//! | not loopback | not set | off: 403 with a message saying how to turn them on |
//!
//! A configured token is asked for on loopback too, so that a reverse proxy
//! on the same machine does not open the pages to everyone it serves.

use crate::config::Secret;

/// The outcome of [`check`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Access {
    Allowed,
    /// No token is configured and the address is not loopback.
    Off,
    /// A token is configured and the request did not carry it.
    NeedToken,
    /// A token was sent and it is not the right one.
    WrongToken,
}

impl Access {
    /// HTTP status for a refusal (RFC 9110: 401 asks for credentials, 403
    /// refuses whatever is sent).
    pub fn status(&self) -> u16 {
        match self {
            Access::Allowed => 200,
            Access::Off => 403,
            Access::NeedToken | Access::WrongToken => 401,
        }
    }

    /// What the refusal says, for people and for API clients.
    pub fn message(&self) -> &'static str {
        match self {
            Access::Allowed => "",
            Access::Off => "The coordinator's pages are off: this server listens on an address other than loopback and no admin token is configured. Set [web] admin_token_env (or admin_token_file) and send Authorization: Bearer <token>.",
            Access::NeedToken => "This page needs the admin token: send Authorization: Bearer <token>.",
            Access::WrongToken => "The admin token sent is not the configured one.",
        }
    }
}

/// The coordinator's access rule for a server listening on a loopback
/// address or not, with the configured token, for a request carrying
/// `authorization` (the header's value, if any).
pub fn check(loopback: bool, token: Option<&Secret>, authorization: Option<&str>) -> Access {
    let Some(token) = token else {
        return if loopback {
            Access::Allowed
        } else {
            Access::Off
        };
    };
    let Some(sent) = authorization.and_then(bearer) else {
        return Access::NeedToken;
    };
    if same(sent.as_bytes(), token.expose().as_bytes()) {
        Access::Allowed
    } else {
        Access::WrongToken
    }
}

/// The credentials of `Bearer <token>` (RFC 6750 §2.1; the scheme name is
/// case-insensitive, RFC 9110 §11.1).
fn bearer(header: &str) -> Option<&str> {
    let (scheme, rest) = header.trim().split_once(' ')?;
    scheme
        .eq_ignore_ascii_case("bearer")
        .then(|| rest.trim())
        .filter(|t| !t.is_empty())
}

/// Equality that takes the same time wherever the first difference is (the
/// length, which the configuration fixes, is not hidden).
fn same(a: &[u8], b: &[u8]) -> bool {
    if a.len() != b.len() {
        return false;
    }
    let diff = a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y));
    std::hint::black_box(diff) == 0
}

#[cfg(test)]
mod tests {
    use super::*;

    const T: &str = "0123456789abcdef0123456789abcdef";

    #[test]
    fn loopback_without_a_token_is_open_and_elsewhere_it_is_off() {
        assert_eq!(check(true, None, None), Access::Allowed);
        assert_eq!(check(false, None, None), Access::Off);
        assert_eq!(
            check(false, None, Some(&format!("Bearer {T}"))),
            Access::Off,
            "no token configured: nothing sent can open it"
        );
        assert_eq!(Access::Off.status(), 403);
    }

    #[test]
    fn a_configured_token_is_needed_everywhere_and_compared_exactly() {
        let s = Secret::new(T);
        for loopback in [true, false] {
            assert_eq!(check(loopback, Some(&s), None), Access::NeedToken);
            assert_eq!(
                check(loopback, Some(&s), Some(&format!("Bearer {T}"))),
                Access::Allowed
            );
            // RFC 9110 §11.1: the scheme is case-insensitive.
            assert_eq!(
                check(loopback, Some(&s), Some(&format!("bearer  {T} "))),
                Access::Allowed
            );
        }
        let wrong = format!("Bearer {}x", &T[..31]);
        assert_eq!(check(false, Some(&s), Some(&wrong)), Access::WrongToken);
        assert_eq!(
            check(false, Some(&s), Some(&format!("Bearer {T}{T}"))),
            Access::WrongToken
        );
        assert_eq!(
            check(false, Some(&s), Some(&format!("Basic {T}"))),
            Access::NeedToken,
            "another scheme is no bearer token"
        );
        assert_eq!(check(false, Some(&s), Some("Bearer ")), Access::NeedToken);
        assert_eq!(Access::NeedToken.status(), 401);
    }
}
