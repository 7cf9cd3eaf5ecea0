//! `gibbsline token`: make a bearer token (shown once, only its hash goes
//! in the config) or hash one you have.

use super::{TokenCommand, UsageError};

pub(crate) fn run(cmd: &TokenCommand) -> anyhow::Result<()> {
    use gibbsline::auth::{Role, TokenSpec, sha256_hex};
    match cmd {
        TokenCommand::New {
            name,
            role,
            channel,
        } => {
            let role: Role = role
                .parse()
                .map_err(|e| UsageError(format!("--role {e}")))?;
            if role != Role::Rig && !channel.is_empty() {
                return Err(
                    UsageError("--channel: only a rig token is held to channels".into()).into(),
                );
            }
            if role == Role::Rig && channel.is_empty() {
                return Err(UsageError(format!(
                    "--channel: a rig token must name the channels it may stream (repeat --channel), or --channel '{}' for every channel",
                    gibbsline::auth::ALL_CHANNELS
                ))
                .into());
            }
            // 32 bytes from the kernel's CSPRNG: 256 bits, beyond guessing.
            let mut secret = [0u8; 32];
            std::io::Read::read_exact(&mut std::fs::File::open("/dev/urandom")?, &mut secret)?;
            let token: String = std::iter::once("gl_".to_string())
                .chain(secret.iter().map(|b| format!("{b:02x}")))
                .collect();
            let spec = TokenSpec {
                name: name.clone(),
                role,
                sha256: sha256_hex(&token),
                channels: channel.clone(),
            };
            #[derive(serde::Serialize)]
            struct Entry<'a> {
                token: [&'a TokenSpec; 1],
            }
            println!(
                "# Give this token to {name:?}; it is shown only now (the config keeps its SHA-256):"
            );
            println!("#   GIBBSLINE_TOKEN={token}");
            print!("{}", toml::to_string(&Entry { token: [&spec] })?);
            Ok(())
        }
        TokenCommand::Hash => {
            let mut line = String::new();
            std::io::stdin().read_line(&mut line)?;
            let token = line.trim();
            if token.is_empty() {
                return Err(UsageError("standard input: no token given".into()).into());
            }
            println!("{}", sha256_hex(token));
            Ok(())
        }
    }
}
