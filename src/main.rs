//! The `sluice` binary: parse the command line, run it, print the error chain and pick the exit
//! code. Everything else lives in the library and in `cli`.

mod cli;

use clap::Parser;

fn main() {
    let args = cli::args::Cli::parse();
    let code = match cli::run(args) {
        Ok(code) => code,
        Err(err) => {
            // A closed pipe (`sluice cat big | head`) is not an error worth a message.
            if let Some(io) = err.downcast_ref::<std::io::Error>() {
                if io.kind() == std::io::ErrorKind::BrokenPipe {
                    std::process::exit(0);
                }
            }
            eprintln!("error: {err}");
            let mut source = err.source();
            while let Some(s) = source {
                let text = s.to_string();
                if !err.to_string().contains(&text) {
                    eprintln!("  caused by: {text}");
                }
                source = s.source();
            }
            match err.downcast_ref::<sluice::Error>() {
                Some(e) => e.exit_code(),
                None => 2,
            }
        }
    };
    std::process::exit(code);
}
