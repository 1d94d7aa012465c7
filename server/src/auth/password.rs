//! Passwords: argon2id (RFC 9106) with the `argon2` crate's default cost
//! (19 MiB, 2 passes, 1 lane — the OWASP password-storage recommendation),
//! stored as PHC strings so each hash carries its own parameters and salt.
//! Verification honours the parameters in the stored string. Hashing is
//! CPU-heavy: call these from `spawn_blocking`, never on an async worker.

use argon2::Argon2;
use argon2::password_hash::{PasswordHash, PasswordHasher, PasswordVerifier, SaltString};
use rand::RngCore;
use thiserror::Error;

/// Shortest accepted new password, in characters (common practice, no source;
/// NIST SP 800-63B asks for at least 8).
pub const MIN_PASSWORD_CHARS: usize = 12;
/// Longest accepted password, in bytes (bounds the work of one sign-in attempt).
pub const MAX_PASSWORD_BYTES: usize = 1024;

/// A password that cannot be used or a stored hash that cannot be read.
#[derive(Debug, Error, PartialEq)]
pub enum PasswordError {
    /// Fewer than [`MIN_PASSWORD_CHARS`] characters.
    #[error("a password needs at least {min} characters")]
    TooShort {
        /// The minimum.
        min: usize,
    },
    /// More than [`MAX_PASSWORD_BYTES`] bytes.
    #[error("a password may have at most {max} bytes")]
    TooLong {
        /// The maximum.
        max: usize,
    },
    /// The stored string is not an argon2 PHC string.
    #[error("stored password hash is malformed: {0}")]
    Malformed(String),
    /// Hashing failed (parameters refused by the library).
    #[error("password hashing failed: {0}")]
    Hashing(String),
}

/// Checks a new password against the length rules.
pub fn check_new_password(password: &str) -> Result<(), PasswordError> {
    if password.len() > MAX_PASSWORD_BYTES {
        return Err(PasswordError::TooLong { max: MAX_PASSWORD_BYTES });
    }
    if password.chars().count() < MIN_PASSWORD_CHARS {
        return Err(PasswordError::TooShort { min: MIN_PASSWORD_CHARS });
    }
    Ok(())
}

/// Hashes a password with a fresh 128-bit random salt; returns the PHC string
/// `$argon2id$v=19$m=19456,t=2,p=1$<salt>$<hash>`.
pub fn hash_password(password: &str) -> Result<String, PasswordError> {
    check_new_password(password)?;
    let mut salt = [0u8; 16];
    rand::rng().fill_bytes(&mut salt);
    let salt = SaltString::encode_b64(&salt).map_err(|e| PasswordError::Hashing(e.to_string()))?;
    Argon2::default()
        .hash_password(password.as_bytes(), &salt)
        .map(|h| h.to_string())
        .map_err(|e| PasswordError::Hashing(e.to_string()))
}

/// Whether `password` matches the stored PHC string (constant-time comparison
/// inside the library). Over-long passwords never match.
pub fn verify_password(password: &str, stored: &str) -> Result<bool, PasswordError> {
    let parsed = PasswordHash::new(stored).map_err(|e| PasswordError::Malformed(e.to_string()))?;
    if password.len() > MAX_PASSWORD_BYTES {
        return Ok(false);
    }
    match Argon2::default().verify_password(password.as_bytes(), &parsed) {
        Ok(()) => Ok(true),
        Err(argon2::password_hash::Error::Password) => Ok(false),
        Err(e) => Err(PasswordError::Malformed(e.to_string())),
    }
}

/// Spends the time of one verification at the default cost, so that a sign-in
/// for an unknown address takes as long as one for a known address.
pub fn verify_nothing(password: &str) {
    let _ = verify_password(password, DUMMY);
}

/// A well-formed hash at the default cost that no password is known to match.
const DUMMY: &str = "$argon2id$v=19$m=19456,t=2,p=1$c2lnbmluZHVtbXlzYWx0$3mH0n+xVd1s8lB1JXyQ8jW9cHq7pGm8y2YxV2d1f9XQ";

/// A new random password of 20 characters from a 56-symbol alphabet without
/// look-alikes (about 116 bits).
pub fn generate_password() -> String {
    const ALPHABET: &[u8] = b"abcdefghjkmnpqrstuvwxyzABCDEFGHJKLMNPQRSTUVWXYZ23456789";
    let mut rng = rand::rng();
    (0..20).map(|_| ALPHABET[(rng.next_u32() as usize) % ALPHABET.len()] as char).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Reference vector of the Argon2 reference implementation
    /// (P-H-C/phc-winner-argon2, src/test.c): argon2id, v=19, m=65536 KiB, t=2,
    /// p=1, password "password", salt "somesalt".
    const REFERENCE: &str =
        "$argon2id$v=19$m=65536,t=2,p=1$c29tZXNhbHQ$CTFhFdXPJO1aFaMaO6Mm5c8y7cJHAph8ArZWb2GRPPc";

    fn check(password: &str, stored: &str, expected: Result<bool, ()>) {
        let got = verify_password(password, stored).map_err(|_| ());
        assert_eq!(got, expected, "{password:?} against {stored}");
    }

    #[test]
    fn reference_vector_verifies() {
        check("password", REFERENCE, Ok(true));
        check("passwore", REFERENCE, Ok(false));
        check("", REFERENCE, Ok(false));
        check("password", "not a phc string", Err(()));
        // The stand-in hash for unknown users is well formed, so it costs a
        // full verification.
        check("password", DUMMY, Ok(false));
    }

    #[test]
    fn own_hashes_round_trip_with_the_default_cost_and_fresh_salts() {
        let a = hash_password("correct horse battery").unwrap();
        let b = hash_password("correct horse battery").unwrap();
        assert!(a.starts_with("$argon2id$v=19$m=19456,t=2,p=1$"), "{a}");
        assert_ne!(a, b, "salts differ");
        check("correct horse battery", &a, Ok(true));
        check("correct horse batterY", &a, Ok(false));
    }

    #[test]
    fn length_rules() {
        assert_eq!(check_new_password("short"), Err(PasswordError::TooShort { min: 12 }));
        // 12 characters of 2 bytes each pass: the rule counts characters.
        assert_eq!(check_new_password("éééééééééééé"), Ok(()));
        let long = "x".repeat(MAX_PASSWORD_BYTES + 1);
        assert_eq!(check_new_password(&long), Err(PasswordError::TooLong { max: 1024 }));
        check(&long, REFERENCE, Ok(false));
        assert!(hash_password("short").is_err());
    }

    #[test]
    fn generated_passwords_pass_the_rules_and_differ() {
        let (a, b) = (generate_password(), generate_password());
        assert_ne!(a, b);
        assert_eq!(check_new_password(&a), Ok(()));
        assert!(a.chars().all(|c| c.is_ascii_alphanumeric() && !"01lIoO".contains(c)));
    }
}
