//! What reaches a person's terminal and nothing else: whether to colour (`--color`, `NO_COLOR`,
//! whether the stream is a terminal). Kept apart so that every renderer asks the same question
//! the same way, and so that output that is piped or read by a program stays plain.

use std::io::IsTerminal;

use super::args::ColorArg;

/// Whether `NO_COLOR` asks for no colour: set and not empty (the convention of no-color.org).
pub fn no_color_env() -> bool {
    std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty())
}

/// Whether to colour a stream: `always` and `never` are obeyed as typed; `auto` colours only
/// a terminal, and only when `NO_COLOR` is not set.
pub fn colour(choice: ColorArg, is_terminal: bool) -> bool {
    match choice {
        ColorArg::Always => true,
        ColorArg::Never => false,
        ColorArg::Auto => is_terminal && !no_color_env(),
    }
}

/// Whether to colour standard output.
pub fn colour_stdout(choice: ColorArg) -> bool {
    colour(choice, std::io::stdout().is_terminal())
}

/// Whether to colour standard error.
pub fn colour_stderr(choice: ColorArg) -> bool {
    colour(choice, std::io::stderr().is_terminal())
}

/// The `--color` value as typed on the command line, read before clap parses it, so that
/// clap's own help and usage errors follow it too. The last one wins, as clap's would; words
/// after `--` belong to an outside command and are not looked at.
pub fn color_before_parsing(args: &[std::ffi::OsString]) -> Option<ColorArg> {
    let mut found = None;
    let mut it = args.iter().skip(1);
    while let Some(a) = it.next() {
        let Some(a) = a.to_str() else { continue };
        if a == "--" {
            break;
        }
        let value = if a == "--color" {
            it.next().and_then(|v| v.to_str())
        } else {
            a.strip_prefix("--color=")
        };
        match value {
            Some("always") => found = Some(ColorArg::Always),
            Some("never") => found = Some(ColorArg::Never),
            Some("auto") => found = Some(ColorArg::Auto),
            _ => {}
        }
    }
    found
}

#[cfg(test)]
mod tests {
    use super::*;

    fn os(v: &[&str]) -> Vec<std::ffi::OsString> {
        v.iter().map(Into::into).collect()
    }

    #[test]
    fn explicit_choices_win_over_the_terminal() {
        assert!(colour(ColorArg::Always, false));
        assert!(!colour(ColorArg::Never, true));
        assert!(!colour(ColorArg::Auto, false));
    }

    #[test]
    fn color_is_read_before_parsing_but_not_after_the_double_dash() {
        assert_eq!(
            color_before_parsing(&os(&["sluice", "--color", "never", "log"])),
            Some(ColorArg::Never)
        );
        assert_eq!(
            color_before_parsing(&os(&["sluice", "diff", "a", "b", "--color=always"])),
            Some(ColorArg::Always)
        );
        assert_eq!(
            color_before_parsing(&os(&["sluice", "exec", "--", "tool", "--color", "never"])),
            None
        );
    }
}
