//! The command-line arguments more than one command takes: what is known
//! of a hole (`leak open`), a change to an event's parameters (`leak
//! revise`, `replay`), the default database, and the runtime the async
//! commands run on.
//!
//! Each value is checked by the one rule for its quantity
//! (`estimate/params.rs`), so every command refuses the same values in
//! the same words.
//!
//! Left out: each command's own arguments, which live with the command.

use crate::config::Config;
use crate::estimate::{
    ParamChange, ParamError, check_cd, check_cd_range, check_density_kg_m3, check_hole_diameter_mm,
    check_hole_height_m,
};
use crate::report::Presentation;
use anyhow::bail;
use std::path::{Path, PathBuf};

/// Where the site config is looked for when neither `--config` nor
/// `LEAKTALLY_CONFIG` names one (the systemd unit's `--config`).
pub const STANDARD_CONFIG: &str = "/etc/leaktally/site.toml";

/// Where a command finds the site: its config and its database. Each is
/// taken from the option, else its environment variable, else (the config)
/// the standard path or (the database) the config's `[site] database`, so
/// that on a set-up site an operator types `leaktally leak open --tank
/// T-104` and nothing more.
#[derive(Debug, Clone, Default, clap::Args)]
pub struct SiteArgs {
    #[command(flatten)]
    pub config: ConfigArg,
    /// The SQLite database the daemon writes [default: the config's
    /// [site] database].
    #[arg(long, value_name = "FILE", env = "LEAKTALLY_DB", value_parser = path_arg)]
    pub db: Option<PathBuf>,
}

/// How to name a config, said wherever none was found.
const NAME_A_CONFIG: &str =
    "give --config FILE, set LEAKTALLY_CONFIG=FILE, or install it as /etc/leaktally/site.toml";

/// The site config, for commands that need no database.
#[derive(Debug, Clone, Default, clap::Args)]
pub struct ConfigArg {
    /// The site config (TOML) [default: /etc/leaktally/site.toml, when it
    /// exists].
    #[arg(long, short, value_name = "FILE", env = "LEAKTALLY_CONFIG", value_parser = path_arg)]
    pub config: Option<PathBuf>,
}

impl ConfigArg {
    /// The config file named, or the standard one if it exists.
    pub fn path(&self) -> Option<PathBuf> {
        self.config.clone().or_else(|| {
            let standard = Path::new(STANDARD_CONFIG);
            standard.exists().then(|| standard.to_owned())
        })
    }

    /// The config file, which the command needs.
    pub fn required_path(&self) -> anyhow::Result<PathBuf> {
        match self.path() {
            Some(path) => Ok(path),
            None => bail!("no site config: {NAME_A_CONFIG}"),
        }
    }

    /// The site config, which the command needs.
    pub fn load(&self) -> anyhow::Result<Config> {
        Ok(crate::config::load(&self.required_path()?)?)
    }
}

impl SiteArgs {
    /// The config file named, or the standard one if it exists.
    pub fn config_path(&self) -> Option<PathBuf> {
        self.config.path()
    }

    /// The database, and the site's presentation for what the command
    /// prints. A config that was named but cannot be read is an error when
    /// the database must come from it; with `--db` given, it only costs the
    /// site's zone and units, and a warning says so.
    /// The site config, which the daemon needs, and its database: both
    /// from one reading of the file.
    pub fn config_and_database(&self) -> anyhow::Result<(Config, PathBuf)> {
        let config = self.config.load()?;
        let db = match &self.db {
            Some(db) => db.clone(),
            None => database_of(&config)?,
        };
        Ok((config, db))
    }

    pub fn database(&self) -> anyhow::Result<(PathBuf, Presentation)> {
        let config = self.config_path().map(|path| crate::config::load(&path));
        match (&self.db, config) {
            (Some(db), None) => Ok((db.clone(), Presentation::default())),
            (Some(db), Some(Ok(config))) => Ok((db.clone(), Presentation::of(&config))),
            (Some(db), Some(Err(e))) => {
                eprintln!(
                    "warning: {}; times are shown in UTC and figures in metric units",
                    crate::logging::lines(&format!("{e}"))
                );
                Ok((db.clone(), Presentation::default()))
            }
            (None, Some(Ok(config))) => Ok((database_of(&config)?, Presentation::of(&config))),
            (None, Some(Err(e))) => Err(e.into()),
            (None, None) => bail!(
                "no database named: give --db FILE, set LEAKTALLY_DB=FILE, or name the site config whose [site] database it is ({NAME_A_CONFIG})"
            ),
        }
    }

    /// The site's presentation, if a config is found and valid; UTC and
    /// metric otherwise (for commands that read the database only).
    pub fn presentation(&self) -> Presentation {
        self.config_path()
            .and_then(|path| crate::config::load(&path).ok())
            .map_or_else(Presentation::default, |c| Presentation::of(&c))
    }
}

/// The database a config names, or how to name one.
fn database_of(config: &Config) -> anyhow::Result<PathBuf> {
    match &config.database {
        Some(db) => Ok(db.clone()),
        None => bail!(
            "{} names no database; add `database = \"/var/lib/leaktally/site.db\"` to its [site] table, or give --db FILE (or set LEAKTALLY_DB)",
            config.path.display()
        ),
    }
}

/// What is known of the hole.
#[derive(Debug, Clone, clap::Args)]
pub struct HoleArgs {
    /// Hole diameter in mm, if known; without it the hole is fitted to the
    /// level drop. (The unit is in the name; --hole-diameter still works.)
    #[arg(
        long = "hole-diameter-mm",
        alias = "hole-diameter",
        value_name = "MM",
        allow_negative_numbers = true
    )]
    pub hole_diameter: Option<f64>,
    /// Height of the hole above the tank bottom in m (default: the bottom,
    /// the conservative choice). (--hole-height still works.)
    #[arg(
        long = "hole-height-m",
        alias = "hole-height",
        value_name = "M",
        allow_negative_numbers = true
    )]
    pub hole_height: Option<f64>,
    /// Discharge coefficient, 0.1 to 1 (default 1.0, conservative; the
    /// band runs from 0.61 to 1.0 unless --cd-range says otherwise).
    #[arg(long, value_name = "CD", allow_negative_numbers = true)]
    pub cd: Option<f64>,
    /// The range the discharge coefficient may lie in, LOW..HIGH (for
    /// example 0.60..0.65 for a hole someone has measured); it must include
    /// --cd. Default 0.61..1.0 (common practice).
    #[arg(long, value_name = "LOW..HIGH")]
    pub cd_range: Option<String>,
}

/// Changed leak parameters, for `leak revise` and `replay`.
#[derive(Debug, Clone, clap::Args)]
pub struct ParamChangeArgs {
    #[command(flatten)]
    pub hole: HoleArgs,
    /// Forget the hole diameter and fit the hole to the level drop instead.
    #[arg(long, conflicts_with = "hole_diameter")]
    pub unknown_diameter: bool,
    /// Liquid density in kg/m³, if the config's is wrong for this event.
    /// (--density still works.)
    #[arg(long = "density-kg-m3", alias = "density", value_name = "KG/M3")]
    pub density: Option<f64>,
}

impl HoleArgs {
    /// What the options give, each checked by its one rule, in SI; in the
    /// order they are checked (a diameter's refusal is said first).
    pub fn change(&self) -> Result<ParamChange, ParamError> {
        Ok(ParamChange {
            hole_diameter_m: self.diameter_m()?,
            hole_height_m: self.height_m()?,
            cd: self.cd_checked()?,
            cd_range: self.cd_range_checked()?,
            ..ParamChange::default()
        })
    }

    /// `--hole-diameter`, in metres.
    pub fn diameter_m(&self) -> Result<Option<f64>, ParamError> {
        self.hole_diameter.map(check_hole_diameter_mm).transpose()
    }

    /// `--hole-height`, in metres.
    pub fn height_m(&self) -> Result<Option<f64>, ParamError> {
        self.hole_height.map(check_hole_height_m).transpose()
    }

    /// `--cd`.
    pub fn cd_checked(&self) -> Result<Option<f64>, ParamError> {
        self.cd.map(check_cd).transpose()
    }

    /// `--cd-range LOW..HIGH`, which must include `--cd` (or the default).
    pub fn cd_range_checked(&self) -> Result<Option<(f64, f64)>, ParamError> {
        self.cd_range
            .as_deref()
            .map(|text| check_cd_range(text, self.cd))
            .transpose()
    }
}

impl ParamChangeArgs {
    /// The change the options give, each value checked, in SI.
    pub fn change(&self) -> Result<ParamChange, ParamError> {
        Ok(ParamChange {
            unknown_diameter: self.unknown_diameter,
            density_kg_m3: self.density.map(check_density_kg_m3).transpose()?,
            ..self.hole.change()?
        })
    }
}

/// The runtime for a command that runs async work (`check`, `poll`, `run`):
/// one thread. The work is I/O (a device's reads, the database's thread)
/// and a little arithmetic a second; worker threads would only hand tasks
/// to each other, and every hand-over is a wake-up and a context switch.
/// Blocking work goes to tokio's blocking pool or the store's own thread.
pub fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    Ok(tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()?)
}

/// An event's id from the command line: a whole number. A tank's id or
/// anything else is refused with what an event id is and where to find it.
pub fn event_id(text: &str) -> Result<i64, String> {
    text.trim().parse::<i64>().ok().filter(|&id| id > 0).ok_or_else(|| {
        format!(
            "\"{}\" is not an event id; an event is named by its number (1, 2, ...), and `leaktally events` lists them with their tanks",
            crate::logging::one_line(text)
        )
    })
}

/// A file path from the command line, refused when it holds a control
/// character (a newline, a tab, an escape, a line separator): the name is
/// echoed into logs and terminals, where such a character could forge a
/// line or rewrite the screen, and no file a site keeps needs one.
pub fn path_arg(text: &str) -> Result<std::path::PathBuf, String> {
    if text.is_empty() {
        return Err("an empty path; give a file name".into());
    }
    if crate::logging::one_line(text) != text {
        return Err(format!(
            "\"{}\" holds a control character (a newline, a tab or an escape); rename the file or give another path",
            crate::logging::one_line(text)
        ));
    }
    Ok(text.into())
}

#[cfg(test)]
mod tests {
    use super::path_arg;

    /// Issue 11: a path with a newline in it could forge a line of the log
    /// or of a terminal wherever it is echoed; it is refused (the CLI's
    /// tests check every command takes its paths through this).
    #[test]
    fn a_path_with_a_control_character_is_refused() {
        assert_eq!(
            path_arg("site.toml").unwrap(),
            std::path::PathBuf::from("site.toml")
        );
        assert!(path_arg("").is_err());
        for bad in [
            "/tmp/none\nOK: config valid",
            "a\u{1b}[31mb",
            "tab\there",
            "x\u{2028}y",
        ] {
            let e = path_arg(bad).unwrap_err();
            assert!(e.contains("control character") && !e.contains('\n'), "{e}");
        }
    }
}
