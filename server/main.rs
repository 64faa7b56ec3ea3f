//! The `gapwise` command line.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

use gapwise::cli;

#[derive(Parser)]
#[command(
    name = "gapwise",
    version,
    about = "Which countries are missing from a cross-national survey programme, and what that does to its findings"
)]
struct Args {
    #[command(subcommand)]
    command: Option<Command>,
}

#[derive(Subcommand)]
enum Command {
    /// Serve a project's pages on localhost (the demo when no folder is given).
    Serve {
        /// Project folder (with project.toml); the bundled demo when omitted.
        dir: Option<PathBuf>,
        /// Address to listen on.
        #[arg(long, default_value = "127.0.0.1:7878")]
        addr: SocketAddr,
        /// Allow an address other than loopback (anyone reaching it can read the data).
        #[arg(long)]
        allow_remote: bool,
    },
    /// Validate a project folder: a summary, or one line per problem (file:row:column: message).
    Check {
        dir: PathBuf,
        /// Print the summary as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Write the invented demo project into a folder.
    MakeDemo {
        dir: PathBuf,
        #[arg(long, default_value_t = gapwise::demo::SEED)]
        seed: u64,
    },
}

fn main() -> ExitCode {
    let args = Args::parse();
    let code = match args.command {
        None => cli::serve(&gapwise::demo_dir(), default_addr(), false),
        Some(Command::Serve {
            dir,
            addr,
            allow_remote,
        }) => cli::serve(&dir.unwrap_or_else(gapwise::demo_dir), addr, allow_remote),
        Some(Command::Check { dir, json }) => cli::check(&dir, json),
        Some(Command::MakeDemo { dir, seed }) => cli::make_demo(&dir, seed),
    };
    ExitCode::from(code.clamp(0, 255) as u8)
}

fn default_addr() -> SocketAddr {
    SocketAddr::from(([127, 0, 0, 1], 7878))
}
