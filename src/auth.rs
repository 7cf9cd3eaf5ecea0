//! Bearer tokens with roles. Pure: the table is built from the config and
//! asked one question per call: may this token do this, on this channel?
//!
//! Tokens are stored as SHA-256 digests (hex) and compared in constant
//! time, so neither the config file nor a timing side channel gives one
//! away. Callers log denials with the role and the RPC, never the token.

use crate::error::{FieldError, UnknownChoice};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// What a token's holder may do; each role's calls are in `grpc::authz`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    /// Streams readings for the channels it is granted.
    Rig,
    /// History, state, chemistries, alerts (read).
    Viewer,
    /// Viewer, plus acknowledging alerts and editing rules.
    Operator,
    /// Everything, including channel definitions.
    Admin,
}

impl Role {
    /// The role's name as configs and messages spell it.
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Rig => "rig",
            Role::Viewer => "viewer",
            Role::Operator => "operator",
            Role::Admin => "admin",
        }
    }
}

impl std::str::FromStr for Role {
    type Err = UnknownChoice;
    fn from_str(text: &str) -> Result<Role, UnknownChoice> {
        [Role::Rig, Role::Viewer, Role::Operator, Role::Admin]
            .into_iter()
            .find(|r| r.as_str() == text)
            .ok_or_else(|| UnknownChoice {
                value: text.into(),
                expected: "rig, viewer, operator or admin",
            })
    }
}

/// What a call needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Permission {
    /// Stream readings (StreamReadings, GetResumePoint).
    Ingest,
    /// Read history, state, chemistries, alerts and channels.
    Read,
    /// Acknowledge alerts, edit rules, anchor SOC, reset a timeline.
    Operate,
    /// Define channels.
    Administer,
}

impl Permission {
    fn allowed(self, role: Role) -> bool {
        matches!(
            (self, role),
            (_, Role::Admin)
                | (Permission::Ingest, Role::Rig)
                | (Permission::Read, Role::Viewer | Role::Operator)
                | (Permission::Operate, Role::Operator)
        )
    }
}

/// One token as written in the config.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TokenSpec {
    /// Who holds it (logged on denial).
    pub name: String,
    /// What it may do.
    pub role: Role,
    /// Hex SHA-256 of the token (`gibbsline token hash` prints it).
    pub sha256: String,
    /// For rigs: the channels it may stream, `["*"]` for every channel.
    /// A rig token without any is refused at load (it would fail open or
    /// be useless); other roles ignore it.
    #[serde(default)]
    pub channels: Vec<String>,
}

/// The `channels` entry that grants a rig every channel.
pub const ALL_CHANNELS: &str = "*";

#[derive(Debug, Clone)]
struct Entry {
    digest: [u8; 32],
    name: String,
    role: Role,
    channels: Vec<String>,
}

/// The configured tokens by digest; empty means an open server.
#[derive(Debug, Clone, Default)]
pub struct TokenTable {
    entries: Vec<Entry>,
}

/// Who a call comes from, handed to the handler by the auth layer.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Principal {
    /// The token's `name`.
    pub name: String,
    /// What it may do.
    pub role: Role,
    /// For rigs: the channels granted ([`ALL_CHANNELS`] for all).
    pub channels: Vec<String>,
}

/// Why a call was refused before its handler ran.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum AuthError {
    /// No `authorization` metadata on a server with tokens.
    #[error("a bearer token is required (metadata `authorization: Bearer …`)")]
    Missing,
    /// A token no entry's digest matches.
    #[error("the bearer token is not recognised")]
    Unknown,
    /// The role may not make this call.
    #[error("role {role} may not call {rpc}")]
    Forbidden {
        /// The caller's role.
        role: &'static str,
        /// The method called.
        rpc: &'static str,
    },
    /// A rig token streaming to a channel it is not granted.
    #[error("role rig ({name}) is not granted channel {channel:?}")]
    ChannelNotGranted {
        /// The token's name.
        name: String,
        /// The channel it tried to stream to.
        channel: String,
    },
}

/// Lower-case hex SHA-256 of a token: what a config stores in its place.
pub fn sha256_hex(token: &str) -> String {
    Sha256::digest(token.as_bytes())
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect()
}

fn parse_hex32(text: &str) -> Option<[u8; 32]> {
    if text.len() != 64 {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, byte) in out.iter_mut().enumerate() {
        *byte = u8::from_str_radix(text.get(2 * i..2 * i + 2)?, 16).ok()?;
    }
    Some(out)
}

/// Equal in time independent of where the inputs differ.
fn ct_eq(a: &[u8; 32], b: &[u8; 32]) -> bool {
    let mut diff = 0u8;
    for (x, y) in a.iter().zip(b) {
        diff |= x ^ y;
    }
    std::hint::black_box(diff) == 0
}

impl TokenTable {
    /// The table of `specs`. Refused, naming the entry: a digest that is
    /// not 64 hex digits, a digest given twice (which entry would win is
    /// not the operator's choice to leave to order), and a rig token
    /// without `channels`.
    pub fn new(specs: &[TokenSpec]) -> Result<TokenTable, FieldError> {
        let mut entries: Vec<Entry> = Vec::with_capacity(specs.len());
        for (i, s) in specs.iter().enumerate() {
            let field = |key: &str| format!("token[{i}] ({:?}).{key}", s.name);
            let digest = parse_hex32(&s.sha256.to_ascii_lowercase()).ok_or_else(|| {
                let shown: String = s.sha256.chars().take(80).collect();
                FieldError::new(
                    field("sha256"),
                    format!("{shown:?}"),
                    "must be 64 hex digits (a SHA-256 digest)",
                )
            })?;
            if let Some(j) = entries.iter().position(|e| e.digest == digest) {
                return Err(FieldError::new(
                    field("sha256"),
                    s.sha256.clone(),
                    format!(
                        "the same digest as token[{j}] ({:?}): one token, two entries; give each holder a token of its own",
                        entries[j].name
                    ),
                ));
            }
            if s.role == Role::Rig && s.channels.is_empty() {
                return Err(FieldError::new(
                    field("channels"),
                    "[]",
                    format!(
                        "a rig token must name the channels it may stream, or [\"{ALL_CHANNELS}\"] for every channel"
                    ),
                ));
            }
            entries.push(Entry {
                digest,
                name: s.name.clone(),
                role: s.role,
                channels: s.channels.clone(),
            });
        }
        Ok(TokenTable { entries })
    }

    /// No tokens configured: the server is open (loopback use).
    pub fn is_open(&self) -> bool {
        self.entries.is_empty()
    }

    /// Who presents `authorization` (the raw metadata value), if anyone.
    pub fn identify(&self, authorization: Option<&str>) -> Result<Principal, AuthError> {
        let token = authorization
            .and_then(|v| {
                v.strip_prefix("Bearer ")
                    .or_else(|| v.strip_prefix("bearer "))
            })
            .map(str::trim)
            .filter(|t| !t.is_empty())
            .ok_or(AuthError::Missing)?;
        let digest: [u8; 32] = Sha256::digest(token.as_bytes()).into();
        // Compare against every entry so the time taken does not say which matched.
        let mut found = None;
        for e in &self.entries {
            if ct_eq(&digest, &e.digest) {
                found = Some(e);
            }
        }
        let e = found.ok_or(AuthError::Unknown)?;
        Ok(Principal {
            name: e.name.clone(),
            role: e.role,
            channels: e.channels.clone(),
        })
    }

    /// May the bearer of `authorization` call `rpc` needing `permission`?
    pub fn check(
        &self,
        authorization: Option<&str>,
        permission: Permission,
        rpc: &'static str,
    ) -> Result<Option<Principal>, AuthError> {
        if self.is_open() {
            return Ok(None);
        }
        let p = self.identify(authorization)?;
        if !permission.allowed(p.role) {
            return Err(AuthError::Forbidden {
                role: p.role.as_str(),
                rpc,
            });
        }
        Ok(Some(p))
    }
}

/// A rig may stream only its granted channels (admins any); a rig with
/// none is granted none.
pub fn check_channel(principal: Option<&Principal>, channel_id: &str) -> Result<(), AuthError> {
    match principal {
        Some(p)
            if p.role == Role::Rig
                && !p
                    .channels
                    .iter()
                    .any(|c| c == channel_id || c == ALL_CHANNELS) =>
        {
            Err(AuthError::ChannelNotGranted {
                name: p.name.clone(),
                channel: channel_id.chars().take(80).collect(),
            })
        }
        _ => Ok(()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table() -> TokenTable {
        let spec = |name: &str, role, token: &str, channels: &[&str]| TokenSpec {
            name: name.into(),
            role,
            sha256: sha256_hex(token),
            channels: channels.iter().map(|c| c.to_string()).collect(),
        };
        TokenTable::new(&[
            spec("rig-a", Role::Rig, "r1", &["hl-vrb-1"]),
            spec("screen", Role::Viewer, "v1", &[]),
            spec("shift", Role::Operator, "o1", &[]),
            spec("lead", Role::Admin, "a1", &[]),
        ])
        .unwrap()
    }

    #[test]
    fn sha256_matches_the_standard_test_vector() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        assert_eq!(
            sha256_hex("abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn roles_parse_from_their_config_names() {
        for role in [Role::Rig, Role::Viewer, Role::Operator, Role::Admin] {
            assert_eq!(role.as_str().parse::<Role>(), Ok(role));
        }
        let e = "janitor".parse::<Role>().unwrap_err().to_string();
        assert!(e.contains("\"janitor\"") && e.contains("operator"), "{e}");
    }

    #[test]
    fn every_role_against_every_permission() {
        let t = table();
        let expect = [
            ("r1", [true, false, false, false]),
            ("v1", [false, true, false, false]),
            ("o1", [false, true, true, false]),
            ("a1", [true, true, true, true]),
        ];
        let perms = [
            Permission::Ingest,
            Permission::Read,
            Permission::Operate,
            Permission::Administer,
        ];
        for (token, allowed) in expect {
            for (perm, ok) in perms.iter().zip(allowed) {
                let header = format!("Bearer {token}");
                assert_eq!(
                    t.check(Some(&header), *perm, "X").is_ok(),
                    ok,
                    "{token} {perm:?}"
                );
            }
        }
        assert_eq!(
            t.check(None, Permission::Read, "X"),
            Err(AuthError::Missing)
        );
        assert_eq!(
            t.check(Some("Bearer nope"), Permission::Read, "X"),
            Err(AuthError::Unknown)
        );
    }

    #[test]
    fn rigs_are_held_to_their_channels() {
        let t = table();
        let p = t
            .check(Some("Bearer r1"), Permission::Ingest, "StreamReadings")
            .unwrap();
        assert!(check_channel(p.as_ref(), "hl-vrb-1").is_ok());
        assert!(matches!(
            check_channel(p.as_ref(), "hl-pem-stack"),
            Err(AuthError::ChannelNotGranted { .. })
        ));
        let admin = t
            .check(Some("Bearer a1"), Permission::Ingest, "StreamReadings")
            .unwrap();
        assert!(check_channel(admin.as_ref(), "anything").is_ok());
    }

    #[test]
    fn a_rig_without_channels_is_refused_and_star_grants_all() {
        let spec = |name: &str, token: &str, channels: &[&str]| TokenSpec {
            name: name.into(),
            role: Role::Rig,
            sha256: sha256_hex(token),
            channels: channels.iter().map(|c| c.to_string()).collect(),
        };
        let e = TokenTable::new(&[spec("rig-b", "r2", &[])])
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("token[0] (\"rig-b\").channels") && e.contains("[\"*\"]"),
            "{e}"
        );
        let t = TokenTable::new(&[spec("rig-all", "r3", &["*"])]).unwrap();
        let p = t
            .check(Some("Bearer r3"), Permission::Ingest, "StreamReadings")
            .unwrap();
        assert!(check_channel(p.as_ref(), "any-channel").is_ok());
        // A principal with no channels (as no table builds any more) is
        // granted none: the rule fails closed.
        let none = Principal {
            name: "x".into(),
            role: Role::Rig,
            channels: vec![],
        };
        assert!(check_channel(Some(&none), "any-channel").is_err());
    }

    #[test]
    fn one_digest_in_two_entries_is_refused_naming_both() {
        let same = sha256_hex("shared");
        let e = TokenTable::new(&[
            TokenSpec {
                name: "lead".into(),
                role: Role::Admin,
                sha256: same.clone(),
                channels: vec![],
            },
            TokenSpec {
                name: "screen".into(),
                role: Role::Viewer,
                sha256: same.to_ascii_uppercase(),
                channels: vec![],
            },
        ])
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("token[1] (\"screen\").sha256") && e.contains("token[0] (\"lead\")"),
            "{e}"
        );
    }

    #[test]
    fn bad_digest_names_the_token() {
        let e = TokenTable::new(&[TokenSpec {
            name: "x".into(),
            role: Role::Rig,
            sha256: "abc".into(),
            channels: vec![],
        }])
        .unwrap_err()
        .to_string();
        assert!(e.contains("token[0]") && e.contains("sha256"));
    }
}
