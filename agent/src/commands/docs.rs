//! `leaktally completions SHELL` and `leaktally manual`: shell completions
//! and man pages, generated from the command-line definition itself, so
//! they say exactly what `--help` says.

use anyhow::Context;
use std::path::PathBuf;

/// `leaktally completions`' options.
#[derive(Debug, clap::Args)]
pub struct CompletionsArgs {
    /// The shell to complete for.
    #[arg(value_enum)]
    pub shell: clap_complete::Shell,
}

/// `leaktally manual`'s options.
#[derive(Debug, clap::Args)]
pub struct ManualArgs {
    /// Write one page per command into this folder (leaktally.1,
    /// leaktally-status.1, ...) instead of printing the main page.
    #[arg(long, value_name = "DIR", value_parser = super::args::path_arg)]
    pub dir: Option<PathBuf>,
}

/// Prints the completion script for `args.shell` to standard output.
pub fn completions(args: CompletionsArgs, mut command: clap::Command) -> anyhow::Result<()> {
    clap_complete::generate(
        args.shell,
        &mut command,
        "leaktally",
        &mut std::io::stdout(),
    );
    Ok(())
}

/// Prints the main man page, or writes every command's page to a folder.
pub fn manual(args: ManualArgs, command: clap::Command) -> anyhow::Result<()> {
    match args.dir {
        None => {
            clap_mangen::Man::new(command).render(&mut std::io::stdout())?;
        }
        Some(dir) => {
            std::fs::create_dir_all(&dir)
                .with_context(|| format!("creating the folder {}", dir.display()))?;
            clap_mangen::generate_to(command, &dir)
                .with_context(|| format!("writing the man pages into {}", dir.display()))?;
            println!(
                "wrote the man pages into {}; read one with `man -l {}/leaktally.1`",
                dir.display(),
                dir.display()
            );
        }
    }
    Ok(())
}
