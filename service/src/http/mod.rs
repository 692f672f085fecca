//! The thin HTTP shell over the core: actix-web routes, RFC 9457 problem documents and the
//! OpenAPI document. It translates JSON to calls and results to JSON; no mathematics here.

pub mod openapi;
pub mod problem;
pub mod routes;

use std::net::{SocketAddr, TcpListener};
use std::sync::Arc;
use std::time::Duration;

use actix_web::dev::Server;
use actix_web::{web, App, HttpServer};
use tokio::sync::Semaphore;
use utoipa::OpenApi;

use crate::settings::Settings;
use routes::AppState;

/// A bound, ready-to-run server. Production and tests build it the same way.
pub struct Application {
    server: Server,
    address: SocketAddr,
}

impl Application {
    /// Binds the listener and builds the server.
    ///
    /// # Errors
    /// When the address cannot be bound.
    pub fn build(settings: &Settings) -> std::io::Result<Self> {
        let listener = TcpListener::bind(&settings.bind)?;
        let address = listener.local_addr()?;
        let document = openapi::ApiDoc::openapi();
        let state = web::Data::new(AppState {
            limits: routes::Limits {
                time: Duration::from_millis(settings.solve_budget_ms),
                memory_bytes: settings.max_request_memory_mb.saturating_mul(1024 * 1024),
                response_bytes: settings.max_response_bytes,
            },
            max_body_bytes: settings.max_body_bytes,
            permits: Arc::new(Semaphore::new(settings.concurrent_solves())),
            openapi_json: document.to_pretty_json().map_err(std::io::Error::other)?,
            routes: openapi::routes(&document),
        });
        let mut server = HttpServer::new(move || {
            App::new()
                .wrap(tracing_actix_web::TracingLogger::default())
                .app_data(state.clone())
                .service(routes::solve)
                .service(routes::tune)
                .service(routes::healthz)
                .service(routes::readyz)
                .service(routes::openapi_json)
                .default_service(web::to(routes::fallback))
        })
        .shutdown_timeout(settings.shutdown_timeout_s);
        if settings.workers > 0 {
            server = server.workers(settings.workers);
        }
        let server = server.listen(listener)?.run();
        Ok(Application { server, address })
    }

    /// The address actually bound (useful with port 0).
    #[must_use]
    pub fn address(&self) -> SocketAddr {
        self.address
    }

    /// The port actually bound.
    #[must_use]
    pub fn port(&self) -> u16 {
        self.address.port()
    }

    /// Serves until SIGTERM or Ctrl-C, then drains in-flight requests.
    ///
    /// # Errors
    /// When the server fails.
    pub async fn run_until_stopped(self) -> std::io::Result<()> {
        self.server.await
    }
}
