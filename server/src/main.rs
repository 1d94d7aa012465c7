//! The `ohmline` binary: parses the command line and runs it. Errors are printed
//! as one line with their causes (`error: … : …`) and exit with status 1.

use clap::Parser;
use ohmline_server::cli::{Cli, init_logging, run};

#[tokio::main]
async fn main() -> std::process::ExitCode {
    let cli = Cli::parse();
    let result = async {
        let config = cli.load_config()?;
        init_logging(config.log_format);
        run(cli, config).await
    }
    .await;
    match result {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            std::process::ExitCode::FAILURE
        }
    }
}
