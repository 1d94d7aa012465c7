//! The `ohmline` binary: parses the command line and runs it.

use clap::Parser;
use ohmline_server::cli::{Cli, init_logging, run};

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let cli = Cli::parse();
    let config = cli.load_config()?;
    init_logging(config.log_format);
    run(cli, config).await
}
