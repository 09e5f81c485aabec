//! API keys, off by default: with `--api-keys FILE`, every request but the health checks (and
//! `/metrics` with `--public-metrics`) must send `Authorization: Bearer <key>`, and jobs belong
//! to the key that created them, as do uploaded rasters (`cache::Scoped`). With `--rate-limit`, each key's requests are also counted
//! against its rate (`governor`), and those beyond it get 429 with `Retry-After`.
//!
//! The file holds SHA-256 hashes of the keys, one per line as 64 hex digits (optionally
//! followed by a label), never the keys themselves; `#` starts a comment. A presented key is
//! hashed and compared with every stored hash in constant time (`subtle`). A caller is known
//! by a prefix of its key's hash, which is what job records store as their owner.

use axum::extract::{Request, State};
use axum::http::header;
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};
use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

use super::problem::ApiError;
use super::state::AppState;

/// Who sent a request: the owner id of its key, or `None` when keys are off.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Caller(pub Option<String>);

impl Caller {
    /// Whether this caller may see a job owned by `owner`.
    pub fn may_see(&self, owner: Option<&str>) -> bool {
        match &self.0 {
            None => true,
            Some(me) => owner == Some(me.as_str()),
        }
    }
}

/// The stored key hashes.
#[derive(Clone, Debug, Default)]
pub struct Keys {
    hashes: Vec<[u8; 32]>,
}

impl Keys {
    /// Reads a key file; errors name the line and say what is expected.
    pub fn load(path: &std::path::Path) -> Result<Keys, String> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| format!("cannot read --api-keys `{}`: {e}", path.display()))?;
        Keys::parse(&text).map_err(|e| format!("--api-keys `{}`: {e}", path.display()))
    }

    pub fn parse(text: &str) -> Result<Keys, String> {
        let mut hashes = Vec::new();
        for (n, line) in text.lines().enumerate() {
            let line = line.split('#').next().unwrap_or("").trim();
            let Some(hex) = line.split_whitespace().next() else {
                continue;
            };
            let hash = decode_hex(hex).ok_or_else(|| {
                format!(
                    "line {} holds `{hex}`, not a SHA-256 hash: write 64 hex digits (e.g. the output of `printf %s KEY | sha256sum`), never the key itself",
                    n + 1
                )
            })?;
            hashes.push(hash);
        }
        if hashes.is_empty() {
            return Err("the file holds no key hashes: add one per line".into());
        }
        Ok(Keys { hashes })
    }

    /// The owner id of `key` when it is one of the stored keys.
    pub fn check(&self, key: &str) -> Option<String> {
        let hash: [u8; 32] = Sha256::digest(key.as_bytes()).into();
        // Every stored hash is compared, so the time does not say which one matched.
        let mut found = subtle::Choice::from(0);
        for stored in &self.hashes {
            found |= stored.ct_eq(&hash);
        }
        bool::from(found).then(|| owner_id(&hash))
    }
}

/// The owner id of a key hash: its first 16 hex digits.
fn owner_id(hash: &[u8; 32]) -> String {
    hash[..8].iter().map(|b| format!("{b:02x}")).collect()
}

fn decode_hex(hex: &str) -> Option<[u8; 32]> {
    if hex.len() != 64 || !hex.is_ascii() {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, byte) in out.iter_mut().enumerate() {
        *byte = u8::from_str_radix(&hex[2 * i..2 * i + 2], 16).ok()?;
    }
    Some(out)
}

/// Paths served without a key: the health checks.
const OPEN: [&str; 2] = ["/healthz", "/readyz"];

/// Middleware: checks the key when keys are on and records the caller for the handlers.
pub async fn require_key(State(state): State<AppState>, mut req: Request, next: Next) -> Response {
    let caller = match state.keys() {
        None => Caller(None),
        Some(keys) => {
            let path = req.uri().path();
            let open =
                OPEN.contains(&path) || (path == "/metrics" && state.config().public_metrics);
            if open {
                Caller(None)
            } else {
                let presented = req
                    .headers()
                    .get(header::AUTHORIZATION)
                    .and_then(|v| v.to_str().ok())
                    .and_then(|v| v.strip_prefix("Bearer "))
                    .map(str::trim);
                match presented.and_then(|k| keys.check(k)) {
                    Some(owner) => {
                        if let Some(retry_after) = state.over_rate(&owner) {
                            return ApiError::RateLimited { retry_after }.into_response();
                        }
                        Caller(Some(owner))
                    }
                    None => {
                        return ApiError::Unauthorized {
                            presented: presented.is_some(),
                        }
                        .into_response()
                    }
                }
            }
        }
    };
    req.extensions_mut().insert(caller);
    next.run(req).await
}

#[cfg(test)]
mod tests {
    use super::*;

    // reference: SHA-256 of "abc" from FIPS 180-2, appendix B.1 (a published worked example).
    const ABC: &str = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";

    #[test]
    fn keys_are_checked_by_their_hash() {
        let keys = Keys::parse(&format!("# analysts\n{ABC} team-a\n\n")).unwrap();
        assert_eq!(keys.check("abc").as_deref(), Some("ba7816bf8f01cfea"));
        assert_eq!(keys.check("abd"), None);
        assert_eq!(keys.check(ABC), None, "the hash itself is not a key");
    }

    #[test]
    fn a_file_with_a_plain_key_is_refused_naming_the_line() {
        let e = Keys::parse("not-a-hash\n").unwrap_err();
        assert!(e.contains("line 1") && e.contains("64 hex digits"), "{e}");
        assert!(Keys::parse("# nothing\n").is_err());
    }

    #[test]
    fn callers_see_their_own_jobs_only() {
        let me = Caller(Some("ba7816bf8f01cfea".into()));
        assert!(me.may_see(Some("ba7816bf8f01cfea")));
        assert!(!me.may_see(Some("0000000000000000")));
        assert!(!me.may_see(None));
        assert!(Caller(None).may_see(Some("anyone")));
    }
}
