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
            // A cause whose words the message already holds (an error
            // that wraps another with `#[error("{0}")]`, or names its
            // source in its own text) is said once.
            let mut said = vec![e.to_string()];
            eprintln!("fringe: error: {}", said[0]);
            for cause in e.chain().skip(1) {
                let text = cause.to_string();
                if !said.iter().any(|s| s.contains(&text)) {
                    eprintln!("  caused by: {text}");
                    said.push(text);
                }
            }
            ExitCode::for_error(&e).into()
        }
        Err(_) => ExitCode::Internal.into(),
    }
}
