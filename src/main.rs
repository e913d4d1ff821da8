//! The `sluice` binary: parse the command line, run it, print the error chain and pick the exit
//! code. Everything else lives in the library and in `cli`.

mod cli;

use clap::{CommandFactory, FromArgMatches};

fn main() {
    // clap's own help and usage errors follow --color too, so it is read before parsing.
    let argv: Vec<std::ffi::OsString> = std::env::args_os().collect();
    let clap_colour = match cli::term::color_before_parsing(&argv) {
        Some(cli::args::ColorArg::Always) => clap::ColorChoice::Always,
        Some(cli::args::ColorArg::Never) => clap::ColorChoice::Never,
        _ if cli::term::no_color_env() => clap::ColorChoice::Never,
        _ => clap::ColorChoice::Auto,
    };
    let matches = cli::args::Cli::command()
        .color(clap_colour)
        .get_matches_from(argv);
    let args = cli::args::Cli::from_arg_matches(&matches).unwrap_or_else(|e| e.exit());
    let colour_errors = cli::term::colour_stderr(args.color);
    // A progress bar for work longer than about a second, only for a person at a terminal,
    // and never alongside JSON.
    if std::io::IsTerminal::is_terminal(&std::io::stderr())
        && !cli::term::asks_for_json(&std::env::args_os().collect::<Vec<_>>())
        && std::env::var_os("TERM").is_none_or(|t| t != "dumb")
    {
        let delay = std::env::var("SLUICE_PROGRESS_DELAY_MS")
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(1000);
        sluice::progress::listen(Box::new(cli::term::Bar::new(
            std::time::Duration::from_millis(delay),
        )));
    }
    let code = match cli::run(args) {
        Ok(code) => code,
        Err(err) => {
            // A closed pipe (`sluice retrieve big | head`) is not an error worth a message.
            // It may come wrapped in context (`output: ...`), so the whole chain is looked at.
            let closed_pipe = err.chain().any(|e| {
                e.downcast_ref::<std::io::Error>()
                    .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
            });
            if closed_pipe {
                std::process::exit(0);
            }
            if colour_errors {
                eprintln!("\x1b[1;31merror:\x1b[0m {err}");
            } else {
                eprintln!("error: {err}");
            }
            let mut source = err.source();
            while let Some(s) = source {
                let text = lower_first(&s.to_string());
                if !err
                    .to_string()
                    .to_lowercase()
                    .contains(&text.to_lowercase())
                {
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

/// Messages are lowercase; the operating system's own ("No such file or directory") too.
fn lower_first(s: &str) -> String {
    let mut c = s.chars();
    match c.next() {
        Some(f) => f.to_lowercase().collect::<String>() + c.as_str(),
        None => String::new(),
    }
}
