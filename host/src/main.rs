//! `fringe`: parse, run, map the result to one documented exit code.
#![forbid(unsafe_code)]

use clap::Parser;
use fringe_host::cli::Cli;
use fringe_host::exit::{is_broken_pipe, ExitCode};

fn main() -> std::process::ExitCode {
    // A bug must not show a Rust panic trace to a plant engineer.
    std::panic::set_hook(Box::new(|info| {
        eprintln!(
            "fringe: internal error: {info}\nThis is a bug in fringe; please report it with the command you ran."
        );
    }));
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            // --help and --version are "errors" to clap that print to stdout.
            let code = if e.use_stderr() {
                ExitCode::Usage
            } else {
                ExitCode::Success
            };
            let _ = e.print();
            return code.into();
        }
    };
    let result = std::panic::catch_unwind(|| fringe_host::run(cli));
    match result {
        Ok(Ok(())) => ExitCode::Success.into(),
        Ok(Err(e)) if is_broken_pipe(&e) => ExitCode::Success.into(),
        Ok(Err(e)) => {
            // A library error that wraps another with the same words
            // (`#[error("{0}")]`) is said once.
            let mut last = e.to_string();
            eprintln!("fringe: error: {last}");
            for cause in e.chain().skip(1) {
                let text = cause.to_string();
                if text != last {
                    eprintln!("  caused by: {text}");
                }
                last = text;
            }
            ExitCode::for_error(&e).into()
        }
        Err(_) => ExitCode::Internal.into(),
    }
}
