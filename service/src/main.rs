//! The `oddsmith` binary: settings, logging, and the server; nothing else.

use clap::Parser;
use oddsmith::http::Application;
use oddsmith::settings::Settings;

#[actix_web::main]
async fn main() -> std::io::Result<()> {
    let settings = Settings::parse();
    tracing_subscriber::fmt()
        .with_env_filter(tracing_subscriber::EnvFilter::new(&settings.log))
        .init();
    let application = Application::build(&settings)?;
    tracing::info!(address = %application.address(), "oddsmith listening");
    application.run_until_stopped().await
}
