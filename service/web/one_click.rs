//! The body of a one-click unsubscribe POST (RFC 8058 §3.2): the key/value
//! `List-Unsubscribe=One-Click`, sent as `application/x-www-form-urlencoded`
//! or as `multipart/form-data` (RFC 7578). A mail program may use either, so
//! both are read. Pure: content type and bytes in, a verdict out.
//!
//! Other fields are allowed and ignored, except `source=page`, which the
//! confirmation button on our own page adds so that the store can say how
//! the request came.

/// What a valid body says.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct OneClick {
    /// The request came from our confirmation page's button.
    pub from_page: bool,
}

/// Why a body is not a one-click request.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum BodyError {
    #[error(
        "the body must be application/x-www-form-urlencoded or multipart/form-data, not `{0}`"
    )]
    ContentType(String),
    #[error("a multipart/form-data body needs a boundary parameter")]
    NoBoundary,
    #[error("the body is not well-formed {0}")]
    Malformed(&'static str),
    #[error("the body does not hold List-Unsubscribe=One-Click (RFC 8058)")]
    NotOneClick,
}

const KEY: &str = "List-Unsubscribe";
const VALUE: &str = "One-Click";

/// Reads a one-click body. `content_type` is the request's `Content-Type`
/// header as sent (parameters included).
pub fn parse(content_type: Option<&str>, body: &[u8]) -> Result<OneClick, BodyError> {
    let ct = content_type.unwrap_or("").trim();
    let (media, params) = match ct.split_once(';') {
        Some((m, p)) => (m.trim(), p),
        None => (ct, ""),
    };
    let fields = if media.eq_ignore_ascii_case("application/x-www-form-urlencoded") {
        serde_urlencoded::from_bytes::<Vec<(String, String)>>(body)
            .map_err(|_| BodyError::Malformed("x-www-form-urlencoded"))?
    } else if media.eq_ignore_ascii_case("multipart/form-data") {
        let boundary = boundary(params).ok_or(BodyError::NoBoundary)?;
        multipart_fields(body, &boundary)?
    } else {
        return Err(BodyError::ContentType(
            crate::notify::header_safe(media).chars().take(80).collect(),
        ));
    };
    if !fields.iter().any(|(k, v)| k == KEY && v == VALUE) {
        return Err(BodyError::NotOneClick);
    }
    Ok(OneClick {
        from_page: fields.iter().any(|(k, v)| k == "source" && v == "page"),
    })
}

/// The `boundary` parameter (RFC 2046 §5.1.1), quoted or not.
fn boundary(params: &str) -> Option<String> {
    for p in params.split(';') {
        let Some((k, v)) = p.split_once('=') else {
            continue;
        };
        if k.trim().eq_ignore_ascii_case("boundary") {
            let v = v.trim();
            let v = v
                .strip_prefix('"')
                .and_then(|v| v.strip_suffix('"'))
                .unwrap_or(v);
            // RFC 2046: 1 to 70 characters.
            if (1..=70).contains(&v.len()) {
                return Some(v.to_string());
            }
        }
    }
    None
}

/// The form fields of a multipart/form-data body that are text: the name
/// from each part's `Content-Disposition: form-data; name="..."` and the
/// part's body (RFC 7578 §4.2).
fn multipart_fields(body: &[u8], boundary: &str) -> Result<Vec<(String, String)>, BodyError> {
    let bad = BodyError::Malformed("multipart/form-data");
    let delimiter = format!("--{boundary}");
    let d = delimiter.as_bytes();
    let mut out = Vec::new();
    // Skip the preamble up to the first delimiter.
    let mut rest = match find(body, d) {
        Some(i) => &body[i + d.len()..],
        None => return Err(bad),
    };
    loop {
        if rest.starts_with(b"--") {
            return Ok(out); // the close delimiter
        }
        // The rest of the delimiter line (transport padding), then CRLF.
        let line_end = find(rest, b"\r\n").ok_or(bad.clone())?;
        rest = &rest[line_end + 2..];
        let next = find_delimiter(rest, d).ok_or(bad.clone())?;
        let part = &rest[..next];
        rest = &rest[next + 2 + d.len()..];
        let (head, content) = match find(part, b"\r\n\r\n") {
            Some(i) => (&part[..i], &part[i + 4..]),
            None => continue, // a part with no header block: not a field
        };
        let head = std::str::from_utf8(head).map_err(|_| bad.clone())?;
        let name = head.split("\r\n").find_map(|h| {
            let (k, v) = h.split_once(':')?;
            k.trim()
                .eq_ignore_ascii_case("content-disposition")
                .then(|| disposition_name(v))
                .flatten()
        });
        if let (Some(name), Ok(value)) = (name, std::str::from_utf8(content)) {
            out.push((name, value.to_string()));
        }
    }
}

/// `name` of `form-data; name="x"`, when the disposition is form-data.
fn disposition_name(v: &str) -> Option<String> {
    let mut parts = v.split(';');
    if !parts.next()?.trim().eq_ignore_ascii_case("form-data") {
        return None;
    }
    parts.find_map(|p| {
        let (k, v) = p.split_once('=')?;
        k.trim().eq_ignore_ascii_case("name").then(|| {
            let v = v.trim();
            v.strip_prefix('"')
                .and_then(|v| v.strip_suffix('"'))
                .unwrap_or(v)
                .to_string()
        })
    })
}

/// Offset of the CRLF that starts the next delimiter line.
fn find_delimiter(hay: &[u8], d: &[u8]) -> Option<usize> {
    let mut from = 0;
    while let Some(i) = find(&hay[from..], b"\r\n") {
        let at = from + i;
        if hay[at + 2..].starts_with(d) {
            return Some(at);
        }
        from = at + 2;
    }
    None
}

fn find(hay: &[u8], needle: &[u8]) -> Option<usize> {
    if needle.is_empty() || hay.len() < needle.len() {
        return None;
    }
    hay.windows(needle.len()).position(|w| w == needle)
}

#[cfg(test)]
mod tests {
    use super::*;

    const URLENC: &str = "application/x-www-form-urlencoded";

    #[test]
    fn the_rfc_8058_urlencoded_body_is_accepted() {
        // RFC 8058 §3.2: the POST body is "List-Unsubscribe=One-Click".
        assert_eq!(
            parse(Some(URLENC), b"List-Unsubscribe=One-Click"),
            Ok(OneClick { from_page: false })
        );
        assert_eq!(
            parse(
                Some("Application/X-WWW-Form-Urlencoded; charset=utf-8"),
                b"source=page&List-Unsubscribe=One-Click"
            ),
            Ok(OneClick { from_page: true })
        );
    }

    #[test]
    fn a_multipart_body_as_a_mail_program_sends_it_is_accepted() {
        // The shape of RFC 8058 §8.1's example and of RFC 7578 §4: CRLF
        // line ends, a quoted boundary, a preamble-free body.
        let body = b"--XyZ12\r\nContent-Disposition: form-data; name=\"List-Unsubscribe\"\r\n\r\nOne-Click\r\n--XyZ12--\r\n";
        assert_eq!(
            parse(Some("multipart/form-data; boundary=\"XyZ12\""), body),
            Ok(OneClick { from_page: false })
        );
        // Unquoted boundary, a preamble, a second field, transport padding.
        let body = b"ignored preamble\r\n--b0 \r\nContent-Disposition: form-data; name=\"other\"\r\nContent-Type: text/plain\r\n\r\nx\r\ny\r\n--b0\r\ncontent-disposition: FORM-DATA; name=List-Unsubscribe\r\n\r\nOne-Click\r\n--b0--";
        assert_eq!(
            parse(
                Some("multipart/form-data; charset=utf-8; boundary=b0"),
                body
            ),
            Ok(OneClick { from_page: false })
        );
    }

    #[test]
    fn anything_else_is_refused_with_a_reason() {
        assert_eq!(
            parse(Some(URLENC), b""),
            Err(BodyError::NotOneClick),
            "an empty POST does not unsubscribe"
        );
        assert_eq!(
            parse(Some(URLENC), b"List-Unsubscribe=one-click"),
            Err(BodyError::NotOneClick),
            "the value is exact"
        );
        assert_eq!(
            parse(None, b"List-Unsubscribe=One-Click"),
            Err(BodyError::ContentType(String::new()))
        );
        assert!(matches!(
            parse(Some("text/plain"), b"List-Unsubscribe=One-Click"),
            Err(BodyError::ContentType(_))
        ));
        assert_eq!(
            parse(Some("multipart/form-data"), b"x"),
            Err(BodyError::NoBoundary)
        );
        // A value that is the right text but not the part's whole body.
        let body = b"--b\r\nContent-Disposition: form-data; name=\"List-Unsubscribe\"\r\n\r\nOne-Click-Not\r\n--b--\r\n";
        assert_eq!(
            parse(Some("multipart/form-data; boundary=b"), body),
            Err(BodyError::NotOneClick)
        );
        // Truncated: no closing delimiter.
        let body =
            b"--b\r\nContent-Disposition: form-data; name=\"List-Unsubscribe\"\r\n\r\nOne-Click";
        assert!(matches!(
            parse(Some("multipart/form-data; boundary=b"), body),
            Err(BodyError::Malformed(_))
        ));
        // A name in a header other than Content-Disposition does not count.
        let body = b"--b\r\nX-Name: name=\"List-Unsubscribe\"\r\n\r\nOne-Click\r\n--b--\r\n";
        assert_eq!(
            parse(Some("multipart/form-data; boundary=b"), body),
            Err(BodyError::NotOneClick)
        );
    }
}
