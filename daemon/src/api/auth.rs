//! Access control: named tokens with a role, read from a token file of hashes.
//!
//! Main types: [`Role`] (observer reads, operator reads and changes), [`TokenSet`] (the
//! parsed token file), [`Access`] (the policy in force) and [`Caller`] (who a request
//! comes from, handed to the handlers for the audit trail).
//!
//! # The token file
//!
//! Our own TOML format; every entry names a person or system, its role, and the
//! SHA-256 of its token in lower-case hex. The tokens themselves are never stored.
//!
//! ```toml
//! [[token]]
//! name = "alice"
//! role = "operator"
//! sha256 = "…64 hex digits…"
//! ```
//!
//! `stiltctl token new --name alice --role operator` makes a token and prints the entry.
//! A token is 32 random bytes (256 bits), so a fast hash is enough: guessing is hopeless
//! whatever the hash costs. Human-chosen passwords would need a slow, salted hash; they
//! are not supported.
//!
//! The daemon refuses a token file that group or others may read or write
//! (`mode & 0o077 != 0`): a hash list is not a secret in itself, but a readable one
//! invites someone to add their own line. Comparisons run in constant time over every
//! entry (`subtle`), so the answer time does not tell how much of a hash matched.
//!
//! # The policy
//!
//! - With a token file: health endpoints are open; every read (status, configuration,
//!   stream, metrics) needs an observer or operator token; every change needs an operator
//!   token. No token → 401 with `WWW-Authenticate: Bearer`; an unknown token → 401
//!   (`error="invalid_token"`); an observer's token on a change → 403.
//! - Without a token file: reads are open. Changes are accepted, audited as `local`, only
//!   when the daemon listens on a loopback address (anyone who can reach it is already on
//!   the machine); on any other address they are refused with 403, telling to configure
//!   `network.token_file`. A token sent to a daemon without a token file is ignored.

use std::fmt;
use std::path::Path;

use axum::http::HeaderMap;
use axum::http::header::AUTHORIZATION;
use serde::Deserialize;
use subtle::ConstantTimeEq;

use super::error::ApiError;

/// What a token may do.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Role {
    /// Reads status, configuration, the stream and metrics.
    Observer,
    /// Everything an observer may, and changes.
    Operator,
}

impl Role {
    /// The token-file spelling.
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Observer => "observer",
            Role::Operator => "operator",
        }
    }

    /// Parses the token-file spelling.
    pub fn parse(s: &str) -> Option<Role> {
        match s {
            "observer" => Some(Role::Observer),
            "operator" => Some(Role::Operator),
            _ => None,
        }
    }
}

impl fmt::Display for Role {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// What an endpoint needs of its caller.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Need {
    /// Nothing (liveness and readiness).
    Open,
    /// Observer or operator (when a token file is configured).
    Read,
    /// Operator.
    Change,
}

impl Need {
    /// The spelling used in the OpenAPI document's `x-stilt-access`.
    pub fn as_str(self) -> &'static str {
        match self {
            Need::Open => "open",
            Need::Read => "observer",
            Need::Change => "operator",
        }
    }
}

/// One entry of the token file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TokenEntry {
    /// Who holds the token (recorded in the audit trail).
    pub name: String,
    /// What it may do.
    pub role: Role,
    /// SHA-256 of the token text.
    pub sha256: [u8; 32],
}

/// Every token the daemon accepts.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct TokenSet {
    /// The entries, in file order.
    pub entries: Vec<TokenEntry>,
}

/// A token file that cannot be used, with what to do about it.
#[derive(Debug, thiserror::Error)]
pub enum TokenFileError {
    /// The file cannot be read.
    #[error("token file {path}: cannot read it: {source}")]
    Read {
        /// The file.
        path: String,
        /// The cause.
        source: std::io::Error,
    },
    /// Group or others have access.
    #[error(
        "token file {path} is accessible to group or others (mode {mode:04o}); \
         it must be readable by the daemon's user only: run `chmod 600 {path}`"
    )]
    Permissions {
        /// The file.
        path: String,
        /// Its permission bits.
        mode: u32,
    },
    /// The content is wrong.
    #[error("token file {path}: {message}")]
    Content {
        /// The file.
        path: String,
        /// What is wrong and what is allowed.
        message: String,
    },
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTokenFile {
    #[serde(default)]
    token: Vec<RawToken>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawToken {
    name: String,
    role: String,
    sha256: String,
}

/// SHA-256 of a token's text (FIPS 180-4).
pub fn hash_token(token: &str) -> [u8; 32] {
    let d = ring::digest::digest(&ring::digest::SHA256, token.as_bytes());
    let mut out = [0u8; 32];
    out.copy_from_slice(d.as_ref());
    out
}

/// Lower-case hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    use std::fmt::Write;
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        let _ = write!(s, "{b:02x}");
    }
    s
}

fn unhex32(s: &str) -> Option<[u8; 32]> {
    if s.len() != 64 || !s.is_ascii() {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, o) in out.iter_mut().enumerate() {
        *o = u8::from_str_radix(&s[2 * i..2 * i + 2], 16).ok()?;
    }
    Some(out)
}

/// A fresh random token: `stilt_` and 64 hex digits (32 bytes from the OS generator).
pub fn generate_token() -> Result<String, String> {
    use ring::rand::SecureRandom;
    let mut b = [0u8; 32];
    ring::rand::SystemRandom::new()
        .fill(&mut b)
        .map_err(|_| "the operating system's random generator failed".to_string())?;
    Ok(format!("stilt_{}", hex(&b)))
}

/// The token-file entry for a token (what `stiltctl token new` prints).
pub fn token_entry_toml(name: &str, role: Role, token: &str) -> String {
    format!(
        "[[token]]\nname = \"{name}\"\nrole = \"{role}\"\nsha256 = \"{}\"\n",
        hex(&hash_token(token))
    )
}

fn valid_name(n: &str) -> bool {
    !n.is_empty()
        && n.len() <= 64
        && n.chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '_' | '-' | '.' | '@'))
}

impl TokenSet {
    /// Parses the token file's text. `origin` names it in errors.
    pub fn parse(text: &str, origin: &str) -> Result<TokenSet, TokenFileError> {
        let content = |message: String| TokenFileError::Content {
            path: origin.to_string(),
            message,
        };
        let raw: RawTokenFile = toml::from_str(text).map_err(|e| {
            content(format!(
                "{} (expected [[token]] tables with name, role and sha256)",
                e.message().trim()
            ))
        })?;
        let mut entries: Vec<TokenEntry> = Vec::with_capacity(raw.token.len());
        for (i, t) in raw.token.into_iter().enumerate() {
            let at = format!("token[{i}]");
            if !valid_name(&t.name) {
                return Err(content(format!(
                    "{at}.name = {:?}: a name is 1 to 64 of A–Z a–z 0–9 _ - . @",
                    t.name
                )));
            }
            let Some(role) = Role::parse(&t.role) else {
                return Err(content(format!(
                    "{at}.role = {:?}: allowed are \"observer\" and \"operator\"",
                    t.role
                )));
            };
            let Some(sha256) = unhex32(&t.sha256.to_ascii_lowercase()) else {
                return Err(content(format!(
                    "{at}.sha256: not a SHA-256 hash; allowed is 64 hex digits \
                     (`stiltctl token new` prints one)"
                )));
            };
            if entries.iter().any(|e| e.name == t.name) {
                return Err(content(format!(
                    "{at}.name = {:?}: the name is used twice; each token needs its own name",
                    t.name
                )));
            }
            if entries.iter().any(|e| e.sha256 == sha256) {
                return Err(content(format!(
                    "{at}.sha256: the same token is listed twice; give each person their own"
                )));
            }
            entries.push(TokenEntry {
                name: t.name,
                role,
                sha256,
            });
        }
        if entries.is_empty() {
            return Err(content(
                "no [[token]] entries; a token file must list at least one token".into(),
            ));
        }
        Ok(TokenSet { entries })
    }

    /// Reads a token file, refusing one that group or others can access.
    pub fn load(path: &Path) -> Result<TokenSet, TokenFileError> {
        let shown = path.display().to_string();
        let meta = std::fs::metadata(path).map_err(|source| TokenFileError::Read {
            path: shown.clone(),
            source,
        })?;
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = meta.permissions().mode() & 0o7777;
            if mode & 0o077 != 0 {
                return Err(TokenFileError::Permissions { path: shown, mode });
            }
        }
        #[cfg(not(unix))]
        let _ = meta;
        let text = std::fs::read_to_string(path).map_err(|source| TokenFileError::Read {
            path: shown.clone(),
            source,
        })?;
        TokenSet::parse(&text, &shown)
    }

    /// The entry whose hash matches the token. Every entry is compared, in constant time
    /// each, so the time taken does not depend on which entry (if any) matched.
    pub fn find(&self, token: &str) -> Option<&TokenEntry> {
        let h = hash_token(token);
        let mut found = None;
        for e in &self.entries {
            if bool::from(e.sha256.ct_eq(&h)) {
                found = Some(e);
            }
        }
        found
    }
}

/// The policy in force.
#[derive(Debug, Clone)]
pub enum Access {
    /// A token file is configured.
    Tokens(TokenSet),
    /// No token file: reads are open; changes only when listening on loopback.
    NoTokens {
        /// Whether the bind address is loopback (changes accepted as `local`).
        loopback: bool,
    },
}

/// Who a request comes from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Caller {
    /// Token name, or `local` (loopback without a token file), or `anonymous`.
    pub name: String,
    /// Its role, if it has one.
    pub role: Option<Role>,
    /// The client's address, when the server knows it (for the audit log).
    pub peer: Option<std::net::SocketAddr>,
}

impl Caller {
    /// The source written to the audit trail: `api:<name>`. (The control loop receives
    /// the bare name as the request's `who` and adds the `api:` itself.)
    pub fn who(&self) -> String {
        format!("api:{}", self.name)
    }
}

/// The token in an `Authorization: Bearer …` header: `Ok(None)` when there is none.
fn bearer(headers: &HeaderMap) -> Result<Option<&str>, ApiError> {
    let Some(v) = headers.get(AUTHORIZATION) else {
        return Ok(None);
    };
    let bad = || {
        ApiError::unauthorized(
            "invalid_token",
            "the Authorization header must be `Bearer <token>`",
        )
    };
    let s = v.to_str().map_err(|_| bad())?;
    let (scheme, rest) = s.split_once(' ').ok_or_else(bad)?;
    if !scheme.eq_ignore_ascii_case("bearer") {
        return Err(bad());
    }
    let tok = rest.trim();
    if tok.is_empty() {
        return Err(bad());
    }
    Ok(Some(tok))
}

impl Access {
    /// Decides whether a request with these headers may do what `need` says.
    pub fn authorize(&self, headers: &HeaderMap, need: Need) -> Result<Caller, ApiError> {
        match self {
            Access::NoTokens { loopback } => {
                let local = Caller {
                    name: "local".into(),
                    role: Some(Role::Operator),
                    peer: None,
                };
                match need {
                    Need::Open | Need::Read => Ok(local),
                    Need::Change if *loopback => Ok(local),
                    Need::Change => Err(ApiError::forbidden(
                        "changes_disabled",
                        "this daemon listens beyond loopback without a token file, so it \
                         refuses changes; configure network.token_file with operator tokens",
                    )),
                }
            }
            Access::Tokens(set) => {
                let tok = match bearer(headers) {
                    Ok(t) => t,
                    Err(e) if need == Need::Open => {
                        let _ = e;
                        None
                    }
                    Err(e) => return Err(e),
                };
                let entry = match tok {
                    None if need == Need::Open => {
                        return Ok(Caller {
                            name: "anonymous".into(),
                            role: None,
                            peer: None,
                        });
                    }
                    None => {
                        return Err(ApiError::unauthorized(
                            "missing_token",
                            "this request needs a token: send `Authorization: Bearer <token>` \
                             (stiltctl reads it from STILT_TOKEN or --token-file)",
                        ));
                    }
                    Some(t) => set.find(t),
                };
                let Some(entry) = entry else {
                    if need == Need::Open {
                        return Ok(Caller {
                            name: "anonymous".into(),
                            role: None,
                            peer: None,
                        });
                    }
                    return Err(ApiError::unauthorized(
                        "invalid_token",
                        "the token is not known to this daemon; ask its administrator for one",
                    ));
                };
                if need == Need::Change && entry.role < Role::Operator {
                    return Err(ApiError::forbidden(
                        "forbidden",
                        format!(
                            "token `{}` has the role {}; changes need an operator token",
                            entry.name, entry.role
                        ),
                    ));
                }
                Ok(Caller {
                    name: entry.name.clone(),
                    role: Some(entry.role),
                    peer: None,
                })
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use axum::http::HeaderValue;

    #[test]
    fn sha256_matches_the_fips_example() {
        // FIPS 180-2, Appendix B.1: SHA-256("abc").
        assert_eq!(
            hex(&hash_token("abc")),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        // FIPS 180-2, Appendix B.2: the 448-bit two-block message.
        assert_eq!(
            hex(&hash_token(
                "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq"
            )),
            "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"
        );
    }

    fn set() -> TokenSet {
        let text = format!(
            "{}\n{}",
            token_entry_toml("alice", Role::Operator, "tok-a"),
            token_entry_toml("bob", Role::Observer, "tok-b")
        );
        TokenSet::parse(&text, "t.toml").unwrap()
    }

    fn headers(v: &str) -> HeaderMap {
        let mut h = HeaderMap::new();
        h.insert(AUTHORIZATION, HeaderValue::from_str(v).unwrap());
        h
    }

    #[test]
    fn entries_round_trip_and_tokens_are_found_by_hash() {
        let s = set();
        assert_eq!(s.entries.len(), 2);
        assert_eq!(s.find("tok-a").unwrap().name, "alice");
        assert_eq!(s.find("tok-b").unwrap().role, Role::Observer);
        assert!(s.find("tok-c").is_none());
        assert!(s.find("").is_none());
    }

    #[test]
    fn bad_token_files_name_what_is_wrong() {
        let cases = [
            ("", "at least one token"),
            (
                "[[token]]\nname = \"a\"\nrole = \"admin\"\nsha256 = \"00\"\n",
                "role",
            ),
            (
                "[[token]]\nname = \"a\"\nrole = \"observer\"\nsha256 = \"abc\"\n",
                "64 hex digits",
            ),
            (
                "[[token]]\nname = \"a b\"\nrole = \"observer\"\nsha256 = \"abc\"\n",
                "name",
            ),
            ("[[token]]\nname = \"a\"\nrole = \"observer\"\n", "sha256"),
            (
                "[[token]]\nname = \"a\"\nrole = \"observer\"\nsha256 = \"x\"\nsecret = \"y\"\n",
                "unknown field",
            ),
        ];
        for (text, needle) in cases {
            let e = TokenSet::parse(text, "t.toml").unwrap_err().to_string();
            assert!(e.contains(needle), "{text:?}: {e}");
            assert!(e.starts_with("token file t.toml"), "{e}");
        }
        let twice = format!(
            "{}{}",
            token_entry_toml("a", Role::Observer, "x"),
            token_entry_toml("b", Role::Operator, "x")
        );
        let e = TokenSet::parse(&twice, "t").unwrap_err().to_string();
        assert!(e.contains("listed twice"), "{e}");
    }

    #[cfg(unix)]
    #[test]
    fn a_file_others_can_read_is_refused() {
        use std::os::unix::fs::PermissionsExt;
        let dir = std::env::temp_dir().join(format!("stilt-auth-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("tokens.toml");
        std::fs::write(&p, token_entry_toml("alice", Role::Operator, "t")).unwrap();
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o644)).unwrap();
        let e = TokenSet::load(&p).unwrap_err();
        assert!(
            matches!(e, TokenFileError::Permissions { mode: 0o644, .. }),
            "{e}"
        );
        assert!(e.to_string().contains("chmod 600"), "{e}");
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o640)).unwrap();
        assert!(TokenSet::load(&p).is_err());
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o600)).unwrap();
        assert_eq!(TokenSet::load(&p).unwrap().entries.len(), 1);
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn policy_matrix() {
        let a = Access::Tokens(set());
        let none = HeaderMap::new();
        let op = headers("Bearer tok-a");
        let obs = headers("bearer tok-b");
        let bad = headers("Bearer nope");
        let basic = headers("Basic dG9rLWE=");
        // Open endpoints need nothing, even with a bad header.
        for h in [&none, &op, &obs, &bad, &basic] {
            assert!(a.authorize(h, Need::Open).is_ok());
        }
        // Reads.
        assert_eq!(a.authorize(&none, Need::Read).unwrap_err().status, 401);
        assert_eq!(a.authorize(&bad, Need::Read).unwrap_err().status, 401);
        assert_eq!(a.authorize(&basic, Need::Read).unwrap_err().status, 401);
        assert_eq!(a.authorize(&obs, Need::Read).unwrap().name, "bob");
        assert_eq!(a.authorize(&op, Need::Read).unwrap().name, "alice");
        // Changes.
        let e = a.authorize(&none, Need::Change).unwrap_err();
        assert_eq!((e.status.as_u16(), e.code), (401, "missing_token"));
        assert!(e.challenge.unwrap().starts_with("Bearer"));
        let e = a.authorize(&bad, Need::Change).unwrap_err();
        assert_eq!((e.status.as_u16(), e.code), (401, "invalid_token"));
        let e = a.authorize(&obs, Need::Change).unwrap_err();
        assert_eq!((e.status.as_u16(), e.code), (403, "forbidden"));
        assert_eq!(a.authorize(&op, Need::Change).unwrap().who(), "api:alice");

        let lo = Access::NoTokens { loopback: true };
        assert_eq!(
            lo.authorize(&none, Need::Change).unwrap().who(),
            "api:local"
        );
        let wide = Access::NoTokens { loopback: false };
        assert!(wide.authorize(&none, Need::Read).is_ok());
        let e = wide.authorize(&op, Need::Change).unwrap_err();
        assert_eq!((e.status.as_u16(), e.code), (403, "changes_disabled"));
    }

    #[test]
    fn generated_tokens_are_distinct_and_well_formed() {
        let a = generate_token().unwrap();
        let b = generate_token().unwrap();
        assert_ne!(a, b);
        assert_eq!(a.len(), "stilt_".len() + 64);
        let set = TokenSet::parse(&token_entry_toml("x", Role::Observer, &a), "t").unwrap();
        assert!(set.find(&a).is_some());
        assert!(set.find(&b).is_none());
    }
}
