//! Bearer-token authentication of the API methods. Tokens are kept only as
//! SHA-256 digests and compared in constant time: the presented token is
//! hashed, then compared with every accepted digest without an early exit,
//! so neither the position of the first differing byte nor which token
//! matched shows in the timing. Health checks are not wrapped and stay open.

use sha2::{Digest, Sha256};
use tonic::{Request, Status};

use super::status::{ServiceError, to_status};

/// The accepted tokens, as digests. Empty means authentication is off.
#[derive(Clone, Default, PartialEq, Eq)]
pub struct TokenSet {
    digests: Vec<[u8; 32]>,
}

impl std::fmt::Debug for TokenSet {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "TokenSet({} tokens)", self.digests.len())
    }
}

fn digest(token: &[u8]) -> [u8; 32] {
    Sha256::digest(token).into()
}

/// Byte-wise equality whose running time does not depend on where the inputs differ.
fn equal_constant_time(a: &[u8; 32], b: &[u8; 32]) -> bool {
    let diff = a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y));
    // black_box keeps the optimiser from turning the fold into an early exit.
    std::hint::black_box(diff) == 0
}

impl TokenSet {
    /// Digests of `tokens`.
    pub fn new(tokens: &[String]) -> TokenSet {
        TokenSet { digests: tokens.iter().map(|t| digest(t.as_bytes())).collect() }
    }

    /// Whether authentication is on.
    pub fn is_enabled(&self) -> bool {
        !self.digests.is_empty()
    }

    /// Number of accepted tokens.
    pub fn len(&self) -> usize {
        self.digests.len()
    }

    /// Whether no token is accepted (authentication off).
    pub fn is_empty(&self) -> bool {
        self.digests.is_empty()
    }

    /// Whether `token` is one of the accepted tokens (constant time in the token's content).
    pub fn accepts(&self, token: &[u8]) -> bool {
        let d = digest(token);
        let mut ok = false;
        for accepted in &self.digests {
            ok |= equal_constant_time(&d, accepted);
        }
        ok
    }

    /// Checks the `authorization` metadata of a request.
    ///
    /// # Errors
    /// [`ServiceError::Unauthenticated`] when the header is missing, not a
    /// bearer token, or not an accepted token.
    pub fn check(&self, meta: &tonic::metadata::MetadataMap) -> Result<(), ServiceError> {
        if !self.is_enabled() {
            return Ok(());
        }
        let Some(value) = meta.get("authorization") else {
            return Err(ServiceError::Unauthenticated { reason: "missing `authorization: Bearer <token>` metadata" });
        };
        let bytes = value.as_bytes();
        let token = match bytes.get(..7) {
            Some(scheme) if scheme.eq_ignore_ascii_case(b"bearer ") => bytes[7..].trim_ascii(),
            _ => return Err(ServiceError::Unauthenticated { reason: "the authorization scheme must be Bearer" }),
        };
        if self.accepts(token) {
            Ok(())
        } else {
            Err(ServiceError::Unauthenticated { reason: "the bearer token is not accepted" })
        }
    }
}

/// A tonic interceptor that lets a request through only with an accepted token.
#[derive(Clone, Debug)]
pub struct RequireToken {
    tokens: TokenSet,
}

impl RequireToken {
    /// An interceptor over `tokens` (which may be empty: then every request passes).
    pub fn new(tokens: TokenSet) -> RequireToken {
        RequireToken { tokens }
    }
}

impl tonic::service::Interceptor for RequireToken {
    fn call(&mut self, request: Request<()>) -> Result<Request<()>, Status> {
        match self.tokens.check(request.metadata()) {
            Ok(()) => Ok(request),
            Err(e) => {
                tracing::info!(target: "keelson::request", code = "Unauthenticated", error = %e, "request refused");
                Err(to_status(&e, None))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn meta(v: &str) -> tonic::metadata::MetadataMap {
        let mut m = tonic::metadata::MetadataMap::new();
        m.insert("authorization", v.parse().unwrap());
        m
    }

    #[test]
    fn accepts_only_configured_bearer_tokens() {
        let set = TokenSet::new(&["first-token-0123456789".into(), "second-token-012345678".into()]);
        assert!(set.check(&meta("Bearer first-token-0123456789")).is_ok());
        assert!(set.check(&meta("bearer second-token-012345678")).is_ok());
        assert!(set.check(&meta("Bearer first-token-012345678")).is_err(), "one character short");
        assert!(set.check(&meta("Bearer first-token-0123456789x")).is_err(), "one character long");
        assert!(set.check(&meta("Basic first-token-0123456789")).is_err());
        assert!(set.check(&meta("Bearer")).is_err());
        assert!(set.check(&tonic::metadata::MetadataMap::new()).is_err());
        assert!(TokenSet::default().check(&tonic::metadata::MetadataMap::new()).is_ok(), "off when empty");
    }

    #[test]
    fn debug_output_never_shows_a_token() {
        let set = TokenSet::new(&["very-secret-token-123456".into()]);
        assert!(!format!("{set:?}").contains("secret"));
    }
}
