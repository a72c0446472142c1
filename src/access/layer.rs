//! The tower layer in front of every service: reads the bearer token, finds its caller,
//! checks the role the path needs ([`super::need`]) and puts the [`Caller`] into the
//! request's extensions, or answers UNAUTHENTICATED / PERMISSION_DENIED itself.

use std::future::Future;
use std::pin::Pin;
use std::sync::{Arc, RwLock};
use std::task::{Context, Poll};

use tonic::codegen::http;
use tonic::codegen::Service;
use tonic::Status;

use super::tokens::TokenTable;
use super::{need, Caller, Need, Role};

/// Who gets in: everyone as an anonymous admin (no tokens file), or the holders of the
/// tokens of the current table (swapped whole on reload).
pub struct Gate {
    tokens: Option<RwLock<Arc<TokenTable>>>,
}

impl Gate {
    /// Every caller is an anonymous admin.
    pub fn open() -> Gate {
        Gate { tokens: None }
    }

    pub fn with_tokens(table: TokenTable) -> Gate {
        Gate { tokens: Some(RwLock::new(Arc::new(table))) }
    }

    pub fn needs_tokens(&self) -> bool {
        self.tokens.is_some()
    }

    /// Replaces the token table (a reload); no effect on an open gate.
    pub fn replace(&self, table: TokenTable) {
        if let Some(t) = &self.tokens {
            *t.write().unwrap_or_else(|e| e.into_inner()) = Arc::new(table);
        }
    }

    /// The caller a token names under the current table: an anonymous admin on an open gate
    /// (whatever the token), `None` for a token the table does not know. For transports
    /// that carry the token otherwise than in a header (the web view's cookie).
    pub fn caller(&self, token: Option<&str>) -> Option<Caller> {
        let Some(tokens) = &self.tokens else { return Some(Caller::anonymous()) };
        let table = tokens.read().unwrap_or_else(|e| e.into_inner()).clone();
        table.caller(token?.trim())
    }

    /// The caller of a call to `path` with these headers, or the status that refuses it.
    pub fn admit(&self, path: &str, headers: &http::HeaderMap) -> Result<Caller, Status> {
        let Need::Role(needed) = need(path) else { return Ok(Caller { name: None, role: Role::Reader }) };
        let Some(tokens) = &self.tokens else { return Ok(Caller::anonymous()) };
        let Some(value) = headers.get(http::header::AUTHORIZATION) else {
            return Err(Status::unauthenticated("this server needs a token: send the header `authorization: Bearer <token>` (pollard --token or POLLARD_TOKEN)"));
        };
        let token = value.to_str().ok().and_then(|v| v.strip_prefix("Bearer ")).map(str::trim);
        let Some(token) = token.filter(|t| !t.is_empty()) else {
            return Err(Status::unauthenticated("the authorization header is not `Bearer <token>`"));
        };
        let table = tokens.read().unwrap_or_else(|e| e.into_inner()).clone();
        let caller = table.caller(token).ok_or_else(|| Status::unauthenticated("the token is not one this server knows (unknown or withdrawn)"))?;
        if caller.role < needed {
            let method = path.rsplit('/').next().unwrap_or(path);
            return Err(Status::permission_denied(format!("{method} needs the {needed} role; token '{}' has the {} role", caller.label(), caller.role)));
        }
        Ok(caller)
    }
}

/// Puts a [`Gate`] in front of a service.
#[derive(Clone)]
pub struct AuthLayer {
    gate: Arc<Gate>,
}

impl AuthLayer {
    pub fn new(gate: Arc<Gate>) -> AuthLayer {
        AuthLayer { gate }
    }
}

impl<S> tower_layer::Layer<S> for AuthLayer {
    type Service = Auth<S>;
    fn layer(&self, inner: S) -> Auth<S> {
        Auth { inner, gate: self.gate.clone() }
    }
}

#[derive(Clone)]
pub struct Auth<S> {
    inner: S,
    gate: Arc<Gate>,
}

type BoxFuture<T, E> = Pin<Box<dyn Future<Output = Result<T, E>> + Send>>;

impl<S, B> Service<http::Request<B>> for Auth<S>
where
    S: Service<http::Request<B>, Response = http::Response<tonic::body::Body>>,
    S::Future: Send + 'static,
    S::Error: Send + 'static,
{
    type Response = http::Response<tonic::body::Body>;
    type Error = S::Error;
    type Future = BoxFuture<Self::Response, Self::Error>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), Self::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, mut request: http::Request<B>) -> Self::Future {
        match self.gate.admit(request.uri().path(), request.headers()) {
            Ok(caller) => {
                request.extensions_mut().insert(caller);
                Box::pin(self.inner.call(request))
            }
            Err(status) => {
                tracing::debug!(path = request.uri().path(), code = ?status.code(), "call refused");
                Box::pin(std::future::ready(Ok(status.into_http())))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::tokens::{file_line, new_token};
    use super::*;

    #[test]
    fn admits_by_token_and_role() {
        let (r, w) = (new_token().unwrap(), new_token().unwrap());
        let gate = Gate::with_tokens(TokenTable::parse(&format!("{}\n{}\n", file_line("r", Role::Reader, &r), file_line("w", Role::Writer, &w))).unwrap());
        let headers = |t: &str| {
            let mut h = http::HeaderMap::new();
            h.insert(http::header::AUTHORIZATION, t.parse().unwrap());
            h
        };
        let none = http::HeaderMap::new();
        assert_eq!(gate.admit("/grpc.health.v1.Health/Check", &none).unwrap().name, None);
        assert_eq!(gate.admit("/pollard.v1.Runs/GetRun", &none).unwrap_err().code(), tonic::Code::Unauthenticated);
        assert_eq!(gate.admit("/pollard.v1.Runs/GetRun", &headers(&r)).unwrap_err().code(), tonic::Code::Unauthenticated);
        assert_eq!(gate.admit("/pollard.v1.Runs/GetRun", &headers("Bearer pollard_wrong")).unwrap_err().code(), tonic::Code::Unauthenticated);
        assert_eq!(gate.admit("/pollard.v1.Runs/GetRun", &headers(&format!("Bearer {r}"))).unwrap().role, Role::Reader);
        let e = gate.admit("/pollard.v1.Runs/StartRun", &headers(&format!("Bearer {r}"))).unwrap_err();
        assert_eq!(e.code(), tonic::Code::PermissionDenied);
        assert!(e.message().contains("StartRun needs the writer role"), "{}", e.message());
        assert_eq!(gate.admit("/pollard.v1.Runs/StartRun", &headers(&format!("Bearer {w}"))).unwrap().name.as_deref(), Some("w"));
        gate.replace(TokenTable::parse("").unwrap());
        assert_eq!(gate.admit("/pollard.v1.Runs/GetRun", &headers(&format!("Bearer {r}"))).unwrap_err().code(), tonic::Code::Unauthenticated);
        assert_eq!(Gate::open().admit("/pollard.v1.Datasets/DeleteDataset", &none).unwrap(), Caller::anonymous());
    }
}
