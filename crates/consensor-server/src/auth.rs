//! Bearer tokens and roles.
//!
//! A token is 32 random bytes (256 bits) from the operating system's generator, shown once as
//! `cns_` followed by 64 hex digits. Only its SHA-256 is stored: a token is long and random, so a fast
//! hash is enough (no password-style stretching is needed to resist guessing), and looking a token up
//! by its hash means the clear token never reaches the database. The admin token given in the
//! environment is compared by its hash, in constant time.

use axum::extract::FromRequestParts;
use axum::http::request::Parts;
use consensor_store::{NewToken, Store};
use rand::RngCore;
use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

use crate::error::ApiError;
use crate::state::AppState;

/// What a token may do (API.md "Roles and tokens").
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    Admin,
    Operator,
    Station,
    Reader,
}

impl Role {
    pub fn parse(text: &str) -> Option<Role> {
        match text {
            "admin" => Some(Role::Admin),
            "operator" => Some(Role::Operator),
            "station" => Some(Role::Station),
            "reader" => Some(Role::Reader),
            _ => None,
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            Role::Admin => "admin",
            Role::Operator => "operator",
            Role::Station => "station",
            Role::Reader => "reader",
        }
    }
}

/// The authenticated caller of a request.
#[derive(Debug, Clone)]
pub struct Caller {
    pub token_id: String,
    pub role: Role,
    /// For a station token, the station ids it may post for, sorted and without repeats: every
    /// reading of a batch is looked up here, and a gateway's token may name hundreds of stations.
    stations: Vec<String>,
}

impl Caller {
    /// A caller with `role`, bound to `stations` (which may come in any order).
    pub fn new(token_id: String, role: Role, mut stations: Vec<String>) -> Caller {
        stations.sort_unstable();
        stations.dedup();
        Caller {
            token_id,
            role,
            stations,
        }
    }

    /// 403 unless the caller is an admin.
    pub fn require_admin(&self) -> Result<(), ApiError> {
        match self.role {
            Role::Admin => Ok(()),
            other => Err(ApiError::forbidden(format!(
                "this needs an admin token; yours has the role {}",
                other.as_str()
            ))),
        }
    }

    /// 403 unless the caller may read (every role but `station`).
    pub fn require_reader(&self) -> Result<(), ApiError> {
        match self.role {
            Role::Station => Err(ApiError::forbidden(
                "a station token may only post readings",
            )),
            _ => Ok(()),
        }
    }

    /// 403 unless the caller may post readings for stations (admin or station).
    pub fn require_ingest(&self) -> Result<(), ApiError> {
        match self.role {
            Role::Admin | Role::Station => Ok(()),
            other => Err(ApiError::forbidden(format!(
                "posting readings needs a station or admin token; yours has the role {}",
                other.as_str()
            ))),
        }
    }

    /// Whether this caller may post for `station`.
    pub fn may_post_for(&self, station: &str) -> bool {
        match self.role {
            Role::Admin => true,
            Role::Station => self
                .stations
                .binary_search_by(|bound| bound.as_str().cmp(station))
                .is_ok(),
            _ => false,
        }
    }
}

/// The SHA-256 of a token.
pub fn token_hash(token: &str) -> [u8; 32] {
    Sha256::digest(token.as_bytes()).into()
}

/// A fresh token and its public id.
pub fn generate_token() -> (String, String) {
    let mut secret = [0u8; 32];
    rand::rng().fill_bytes(&mut secret);
    let mut id = [0u8; 8];
    rand::rng().fill_bytes(&mut id);
    (
        format!("tok_{}", hex::encode(id)),
        format!("cns_{}", hex::encode(secret)),
    )
}

/// Creates and stores a token; returns the clear token (to be shown once) with the stored record.
pub async fn issue_token(
    state: &AppState,
    role: Role,
    stations: Vec<String>,
    label: Option<String>,
) -> Result<(String, NewToken), ApiError> {
    let (id, token) = generate_token();
    let record = NewToken {
        id,
        hash: token_hash(&token).to_vec(),
        role: role.as_str().to_owned(),
        label,
        stations,
        created_at_ms: state.clock.now_ms(),
    };
    state.store.insert_token(&record).await?;
    Ok((token, record))
}

/// The bearer token of a request, if it carries one in the right form.
fn bearer(parts: &Parts) -> Result<Option<&str>, ApiError> {
    let Some(value) = parts.headers.get(axum::http::header::AUTHORIZATION) else {
        return Ok(None);
    };
    let text = value
        .to_str()
        .map_err(|_| ApiError::unauthenticated("the Authorization header is not valid text"))?;
    match text.split_once(' ') {
        Some((scheme, token))
            if scheme.eq_ignore_ascii_case("bearer") && !token.trim().is_empty() =>
        {
            Ok(Some(token.trim()))
        }
        _ => Err(ApiError::unauthenticated(
            "the Authorization header must be `Bearer <token>`",
        )),
    }
}

/// Resolves a token to a caller; `None` when it is unknown or revoked.
async fn resolve(state: &AppState, token: &str) -> Result<Option<Caller>, ApiError> {
    let hash = token_hash(token);
    if let Some(admin) = &state.config.admin_token {
        let admin_hash = token_hash(admin.expose());
        if bool::from(hash.ct_eq(&admin_hash)) {
            return Ok(Some(Caller::new(
                "admin-from-environment".into(),
                Role::Admin,
                Vec::new(),
            )));
        }
    }
    let Some(record) = state.store.find_token_by_hash(&hash).await? else {
        return Ok(None);
    };
    let role = Role::parse(&record.role).ok_or_else(|| {
        ApiError::internal(&format!(
            "token {} has unknown role {:?}",
            record.id, record.role
        ))
    })?;
    Ok(Some(Caller::new(record.id, role, record.stations)))
}

impl FromRequestParts<AppState> for Caller {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, ApiError> {
        let token = bearer(parts)?.ok_or_else(|| {
            ApiError::unauthenticated("this needs a token: send `Authorization: Bearer <token>`")
        })?;
        let caller = resolve(state, token)
            .await?
            .ok_or_else(|| ApiError::unauthenticated("the token is unknown or has been revoked"))?;
        // Budgets are kept per token id, never per token text (`[rate_limit]`).
        crate::rate_limit::check_token(parts, &caller.token_id)?;
        Ok(caller)
    }
}

/// A caller allowed to read: any non-station token, or anyone at all when `public_read` is set.
#[derive(Debug, Clone)]
pub struct ReadAccess;

impl FromRequestParts<AppState> for ReadAccess {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, ApiError> {
        if state.config.public_read && bearer(parts)?.is_none() {
            // Anonymous readers have no token id: their budget is kept per peer address.
            crate::rate_limit::check_anonymous(parts)?;
            return Ok(ReadAccess);
        }
        let caller = Caller::from_request_parts(parts, state).await?;
        caller.require_reader()?;
        Ok(ReadAccess)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tokens_are_long_random_and_distinct() {
        let (id_a, token_a) = generate_token();
        let (id_b, token_b) = generate_token();
        assert_ne!(token_a, token_b);
        assert_ne!(id_a, id_b);
        // 32 bytes = 256 bits of randomness, hex-encoded (the contract asks for at least 128).
        assert_eq!(token_a.len(), 4 + 64);
    }

    #[test]
    fn token_hash_is_sha256() {
        // FIPS 180-4 / NIST example: SHA-256("abc") =
        // ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad.
        assert_eq!(
            hex::encode(token_hash("abc")),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn roles_round_trip_and_station_binding() {
        for role in [Role::Admin, Role::Operator, Role::Station, Role::Reader] {
            assert_eq!(Role::parse(role.as_str()), Some(role));
        }
        let station = Caller::new(
            "t".into(),
            Role::Station,
            vec![
                "ST-014".into(),
                "ST-002".into(),
                "ST-101".into(),
                "ST-014".into(),
            ],
        );
        for bound in ["ST-002", "ST-014", "ST-101"] {
            assert!(station.may_post_for(bound), "{bound}");
        }
        for other in ["ST-001", "ST-015", "ST-2", "ST-1010", ""] {
            assert!(!station.may_post_for(other), "{other}");
        }
        assert!(station.require_reader().is_err());
        assert!(station.require_ingest().is_ok());
        assert!(station.require_admin().is_err());
    }
}
