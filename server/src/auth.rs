//! Credentials. Line tokens are random 256-bit secrets shown once; only their
//! SHA-256 is stored (a fast hash is right for high-entropy tokens: there is
//! nothing to guess).

use axum::extract::FromRequestParts;
use axum::http::header::AUTHORIZATION;
use axum::http::request::Parts;
use rand::RngCore;
use sha2::{Digest, Sha256};

use crate::app::AppState;
use crate::db::{self, tokens::LineToken};
use crate::error::ApiError;

/// Prefix of line tokens, so a leaked one is recognisable.
pub const LINE_TOKEN_PREFIX: &str = "ohl_";

/// A new random line token: the prefix and 64 hex digits (256 bits).
pub fn new_line_token() -> String {
    let mut bytes = [0u8; 32];
    rand::rng().fill_bytes(&mut bytes);
    format!("{LINE_TOKEN_PREFIX}{}", hex::encode(bytes))
}

/// The stored form of a token.
pub fn hash_token(token: &str) -> String {
    hex::encode(Sha256::digest(token.as_bytes()))
}

/// A request authenticated by a line token.
#[derive(Debug, Clone)]
pub struct MeterAuth {
    /// The token used.
    pub token: LineToken,
}

impl MeterAuth {
    /// Refuses access to any line but the token's own.
    pub fn require_line(&self, line_id: i64) -> Result<(), ApiError> {
        if self.token.line_id == line_id {
            Ok(())
        } else {
            Err(ApiError::Forbidden("this token belongs to another line".into()))
        }
    }
}

impl FromRequestParts<AppState> for MeterAuth {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, ApiError> {
        let value = parts
            .headers
            .get(AUTHORIZATION)
            .and_then(|v| v.to_str().ok())
            .ok_or(ApiError::Unauthorized)?;
        let secret = value
            .strip_prefix("Bearer ")
            .or_else(|| value.strip_prefix("bearer "))
            .map(str::trim)
            .ok_or(ApiError::Unauthorized)?;
        if !secret.starts_with(LINE_TOKEN_PREFIX) {
            return Err(ApiError::Unauthorized);
        }
        let token = db::tokens::find_active(&state.db, &hash_token(secret))
            .await?
            .ok_or(ApiError::Unauthorized)?;
        db::tokens::touch(&state.db, token.id).await?;
        Ok(MeterAuth { token })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tokens_are_long_random_and_hash_stably() {
        let (a, b) = (new_line_token(), new_line_token());
        assert_ne!(a, b);
        assert_eq!(a.len(), LINE_TOKEN_PREFIX.len() + 64);
        assert_eq!(hash_token(&a), hash_token(&a));
        // SHA-256 of "abc" (FIPS 180-2, appendix B.1).
        assert_eq!(
            hash_token("abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }
}
