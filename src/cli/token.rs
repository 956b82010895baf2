//! `plumbline token new`: a fresh bearer token, printed once, and the line
//! that configures it, so that operators never hash a token by hand and the
//! token itself is never written to any file by plumbline.

use std::io::Write;

use anyhow::anyhow;

use super::TokenCommand;
use crate::service::access::{Role, new_token, token_sha256};

/// Runs a `token` subcommand, writing what it prints to `out`.
pub fn run(command: &TokenCommand, out: &mut dyn Write) -> anyhow::Result<()> {
    match command {
        TokenCommand::New { name, role } => {
            let role = Role::parse(role)
                .ok_or_else(|| anyhow!("role '{role}' is not one of score, review, admin"))?;
            if name.is_empty() || name.chars().any(|c| c.is_whitespace() || c.is_control()) {
                return Err(anyhow!(
                    "--name '{name}' must be non-empty with no spaces or control characters"
                ));
            }
            let token = new_token();
            let hash = token_sha256(&token);
            writeln!(
                out,
                "token (shown once; give it to '{name}' and keep no other copy):\n  {token}\n\n\
                 line for the file named by `auth.tokens_file`:\n  {name} {} {hash}\n\n\
                 or inline in the settings file:\n  [[auth.tokens]]\n  name = \"{name}\"\n  \
                 role = \"{}\"\n  sha256 = \"{hash}\"",
                role.name(),
                role.name()
            )?;
            Ok(())
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn printed_line_holds_the_hash_of_the_printed_token() {
        let mut out = Vec::new();
        let cmd = TokenCommand::New {
            name: "robot-1".into(),
            role: "score".into(),
        };
        run(&cmd, &mut out).unwrap();
        let text = String::from_utf8(out).unwrap();
        let token = text
            .lines()
            .nth(1)
            .map(str::trim)
            .filter(|t| t.starts_with("plb_"))
            .unwrap();
        let line = format!("robot-1 score {}", token_sha256(token));
        assert!(text.contains(&line), "{text}");
        let parsed = crate::service::access::parse_tokens_file(&line, "t".as_ref()).unwrap();
        assert_eq!(parsed[0].role, Role::Score);
    }
}
