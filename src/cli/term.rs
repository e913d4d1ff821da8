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

/// The progress bar on standard error: shown only after the work has taken `delay` (about a
/// second: shorter work stays silent), redrawn at most ten times a second on one line, and
/// cleared when the outermost task ends, so that nothing of it stays in the scrollback.
pub struct Bar {
    delay: std::time::Duration,
    state: std::sync::Mutex<BarState>,
}

struct BarState {
    /// The tasks under way, oldest first: id, what, total, unit, done.
    tasks: Vec<(u64, String, Option<u64>, sluice::progress::Unit, u64)>,
    next_id: u64,
    /// The task drawn: the one that last began or moved.
    shown: u64,
    started: Option<std::time::Instant>,
    last_draw: Option<std::time::Instant>,
    drawn: bool,
}

impl Bar {
    pub fn new(delay: std::time::Duration) -> Bar {
        Bar {
            delay,
            state: std::sync::Mutex::new(BarState {
                tasks: Vec::new(),
                next_id: 0,
                shown: 0,
                started: None,
                last_draw: None,
                drawn: false,
            }),
        }
    }

    fn draw(&self, st: &mut BarState, force: bool) {
        let now = std::time::Instant::now();
        let Some(started) = st.started else { return };
        if now.duration_since(started) < self.delay {
            return;
        }
        if !force
            && st
                .last_draw
                .is_some_and(|t| now.duration_since(t) < std::time::Duration::from_millis(100))
        {
            return;
        }
        let shown = st.shown;
        let task = st.tasks.iter().find(|t| t.0 == shown).or(st.tasks.last());
        if let Some((_, what, total, unit, done)) = task {
            let text = bar_line(what, *done, *total, *unit, 78);
            use std::io::Write;
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "\r\x1b[K{text}");
            let _ = err.flush();
            st.drawn = true;
            st.last_draw = Some(now);
        }
    }
}

impl sluice::progress::Listener for Bar {
    fn begin(&self, what: &str, total: Option<u64>, unit: sluice::progress::Unit) -> u64 {
        let Ok(mut st) = self.state.lock() else {
            return 0;
        };
        if st.tasks.is_empty() {
            st.started = Some(std::time::Instant::now());
        }
        st.next_id += 1;
        let id = st.next_id;
        st.tasks.push((id, what.to_string(), total, unit, 0));
        st.shown = id;
        self.draw(&mut st, true);
        id
    }

    fn update(&self, id: u64, done: u64) {
        let Ok(mut st) = self.state.lock() else {
            return;
        };
        if let Some(t) = st.tasks.iter_mut().find(|t| t.0 == id) {
            t.4 = done;
        }
        st.shown = id;
        self.draw(&mut st, false);
    }

    fn end(&self, id: u64) {
        let Ok(mut st) = self.state.lock() else {
            return;
        };
        st.tasks.retain(|t| t.0 != id);
        if st.tasks.is_empty() {
            if st.drawn {
                use std::io::Write;
                let mut err = std::io::stderr().lock();
                let _ = write!(err, "\r\x1b[K");
                let _ = err.flush();
            }
            st.drawn = false;
            st.started = None;
        } else {
            self.draw(&mut st, true);
        }
    }
}

/// One line of the bar, at most `width` characters: what, a gauge when the total is known,
/// the share done and the amounts.
pub fn bar_line(
    what: &str,
    done: u64,
    total: Option<u64>,
    unit: sluice::progress::Unit,
    width: usize,
) -> String {
    use sluice::progress::Unit;
    let amount = |n: u64| match unit {
        Unit::Bytes => format!("{:.1} MB", n as f64 / 1e6),
        Unit::Steps => n.to_string(),
    };
    let tail = match (total, unit) {
        (Some(t), Unit::Steps) => format!("step {} of {t}", done.min(t)),
        (Some(t), Unit::Bytes) => format!("{:.1} of {}", done.min(t) as f64 / 1e6, amount(t)),
        (None, _) => amount(done),
    };
    let gauge = match total {
        Some(t) if t > 0 => {
            let share = done.min(t) as f64 / t as f64;
            let cells = 20usize;
            let full = (share * cells as f64).floor() as usize;
            format!(
                " [{}{}] {:>3}%",
                "#".repeat(full),
                "-".repeat(cells - full),
                (share * 100.0).floor() as u64
            )
        }
        _ => String::new(),
    };
    let fixed = gauge.chars().count() + tail.chars().count() + 2;
    let room = width.saturating_sub(fixed).max(8);
    let what: String = if what.chars().count() > room {
        let keep: String = what
            .chars()
            .skip(what.chars().count() - (room - 1))
            .collect();
        format!("…{keep}")
    } else {
        what.to_string()
    };
    format!("{what}{gauge}  {tail}")
}

/// Whether this command line asks for JSON (`--json` before any `--`): then nothing but the
/// JSON is written, and no bar either.
pub fn asks_for_json(args: &[std::ffi::OsString]) -> bool {
    args.iter()
        .skip(1)
        .map_while(|a| a.to_str().filter(|a| *a != "--"))
        .any(|a| a == "--json")
}

#[cfg(test)]
mod bar_tests {
    use super::*;
    use sluice::progress::Unit;

    #[test]
    fn a_bar_line_shows_what_how_far_and_fits() {
        assert_eq!(
            bar_line(
                "taking in q3.csv",
                50_000_000,
                Some(200_000_000),
                Unit::Bytes,
                78
            ),
            "taking in q3.csv [#####---------------]  25%  50.0 of 200.0 MB"
        );
        assert_eq!(
            bar_line("reproducing q3_by_shop:v1", 3, Some(20), Unit::Steps, 78),
            "reproducing q3_by_shop:v1 [###-----------------]  15%  step 3 of 20"
        );
        assert_eq!(
            bar_line("reading x", 1_500_000, None, Unit::Bytes, 78),
            "reading x  1.5 MB"
        );
        let long = format!("taking in /{}/q3.csv", "very-long-folder".repeat(10));
        let line = bar_line(&long, 1, Some(2), Unit::Bytes, 78);
        assert!(line.chars().count() <= 78, "{line}");
        assert!(line.starts_with('…') && line.contains("q3.csv"));
    }

    #[test]
    fn json_is_asked_for_only_before_the_double_dash() {
        let os = |v: &[&str]| {
            v.iter()
                .map(Into::into)
                .collect::<Vec<std::ffi::OsString>>()
        };
        assert!(asks_for_json(&os(&["sluice", "log", "--json"])));
        assert!(!asks_for_json(&os(&[
            "sluice", "exec", "--", "tool", "--json"
        ])));
    }
}
