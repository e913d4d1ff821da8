//! Shell completion scripts and manual pages, both generated from the clap definitions in
//! [`super::args`] at run time, so they always describe the build that writes them. The
//! generators are the clap project's own crates (`clap_complete`, `clap_mangen`).

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::Context;
use clap::CommandFactory;

use super::args::{Cli, ShellArg};

/// Writes the completion script for `shell` to `out`.
pub fn completions(shell: ShellArg, out: &mut dyn Write) -> anyhow::Result<()> {
    let mut cmd = Cli::command();
    let shell = match shell {
        ShellArg::Bash => clap_complete::Shell::Bash,
        ShellArg::Zsh => clap_complete::Shell::Zsh,
        ShellArg::Fish => clap_complete::Shell::Fish,
    };
    // clap_complete panics when its writer fails (a closed pipe: `... | head`), so the script
    // is made in memory and written here, where a write error is an ordinary error.
    let mut script = Vec::new();
    clap_complete::generate(shell, &mut cmd, "sluice", &mut script);
    out.write_all(&script)
        .context("writing the completion script")?;
    Ok(())
}

/// The sections the top page has beyond what clap knows: exit status, environment, files.
const TOP_PAGE_EXTRA: &str = r#".SH "EXIT STATUS"
.TP
\fB0\fR
success (also a \fBcompare\fR that finds differences)
.TP
\fB1\fR
the data, the store or the system failed: \fBverify\fR found damage, a damaged object was
read, an inspection failed (at a plan's hold point, or on its own), \fBreproduce\fR could not
show that a version comes from its raw data, \fBexplain\fR computed another value than the
stored one, the disk is full
.TP
\fB2\fR
a usage or input error: bad arguments or option values, a refused file, an unknown version
or dataset, no store
.PP
\fBsluice capture\fR exits with a failing outside command's own status.
.SH ENVIRONMENT
.TP
\fBSLUICE_STORE\fR
the store to use, as \fB\-\-store\fR
.TP
\fBSLUICE_PERSON\fR, \fBSLUICE_EMAIL\fR
who is acting, as \fB\-\-person\fR and \fB\-\-email\fR (before the store's setting, made
with \fBsluice identity\fR)
.TP
\fBNO_COLOR\fR
when set and not empty, no colour unless \fB\-\-color always\fR is given
.SH FILES
.TP
\fIsluice-store/\fR
the store: \fIlineage.db\fR (SQLite) and \fIobjects/\fR (every version's bytes, named by
their BLAKE3 hash); it holds full copies of the raw data received
.SH NOTES
sluice documents what was done to data, by whom, when and why. That is not legal advice; follow
local rules and your organisation's compliance and data-protection staff.
"#;

/// Roff input is read as ASCII by troff unless a preprocessor converts it; characters beyond
/// ASCII (the help texts show `→`, `€`, `␣`) are written as groff's `\[uXXXX]` escapes, which
/// groff and mandoc read on any locale.
fn ascii_roff(page: &[u8]) -> Vec<u8> {
    let text = String::from_utf8_lossy(page);
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        if c.is_ascii() {
            out.push(c);
        } else {
            out.push_str(&format!("\\[u{:04X}]", c as u32));
        }
    }
    out.into_bytes()
}

/// Renders the top manual page, sluice(1): clap's sections, then exit status, environment and
/// files.
pub fn top_page(out: &mut dyn Write) -> anyhow::Result<()> {
    let mut page = Vec::new();
    render_top(&mut page)?;
    out.write_all(&ascii_roff(&page))?;
    Ok(())
}

fn render_top(out: &mut dyn Write) -> anyhow::Result<()> {
    let cmd = Cli::command();
    let man = clap_mangen::Man::new(cmd.clone());
    man.render_title(out)?;
    man.render_name_section(out)?;
    man.render_synopsis_section(out)?;
    man.render_description_section(out)?;
    man.render_options_section(out)?;
    man.render_subcommands_section(out)?;
    man.render_extra_section(out)?;
    out.write_all(TOP_PAGE_EXTRA.as_bytes())?;
    man.render_version_section(out)?;
    Ok(())
}

/// Writes sluice.1 and one page per command and operation (`sluice-apply-trim.1`) into `dir`;
/// returns the files written, top page first.
pub fn write_pages(dir: &Path) -> anyhow::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir)
        .with_context(|| format!("cannot create the folder {}", dir.display()))?;
    let mut written = Vec::new();
    let top = dir.join("sluice.1");
    let mut text = Vec::new();
    top_page(&mut text)?;
    std::fs::write(&top, text).with_context(|| format!("cannot write {}", top.display()))?;
    written.push(top);

    let mut cmd = Cli::command().disable_help_subcommand(true);
    cmd.build();
    fn each(cmd: &clap::Command, dir: &Path, written: &mut Vec<PathBuf>) -> anyhow::Result<()> {
        for sub in cmd.get_subcommands().filter(|s| !s.is_hide_set()) {
            let man = clap_mangen::Man::new(sub.clone());
            let path = dir.join(man.get_filename());
            let mut page = Vec::new();
            man.render(&mut page)?;
            std::fs::write(&path, ascii_roff(&page))
                .with_context(|| format!("cannot write {}", path.display()))?;
            written.push(path);
            each(sub, dir, written)?;
        }
        Ok(())
    }
    each(&cmd, dir, &mut written)?;
    Ok(written)
}
