//! Whether this user may use the database, checked before SQLite tries, so
//! that a refusal says which file or folder is in the way and what to do
//! about it (join the database's group, log in again, or fix a mode)
//! instead of SQLite's "unable to open database file" or "attempt to write
//! a readonly database".
//!
//! The daemon runs as its own user; operators act through the database
//! (`leak` writes an action row, `status` reads), so they need the file,
//! its -wal and -shm files, and its folder through the daemon's group. The
//! shipped unit makes the folder 2770 (setgid, so every file created in it
//! takes the group) and the daemon creates the file 0660; SQLite gives the
//! -wal and -shm files the database file's mode.
//!
//! Left out: access control lists and other security modules (a refusal
//! they cause is left to SQLite's own error), and systems without Unix
//! permissions, where the check passes and SQLite speaks.

use super::{StoreError, StoreResult};
use std::path::{Path, PathBuf};

/// What a command needs of the database.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Need {
    /// Reports (`status` and the like).
    Read,
    /// Operator requests, which write an action row.
    ReadWrite,
}

/// A refusal, in words: who, what, which path, and the way out.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Denied {
    /// The database the user asked for.
    pub db: PathBuf,
    /// The file or folder that refused.
    pub blocked: PathBuf,
    /// The message, whole.
    pub message: String,
}

/// Checks that this process may use the database at `path` as `need`
/// says; [`StoreError::Missing`] when it does not exist, and
/// [`StoreError::Denied`] when a permission stands in the way.
pub fn check(path: &Path, need: Need) -> StoreResult<()> {
    match std::fs::metadata(path) {
        Ok(_) => {}
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(StoreError::Missing(path.to_owned()));
        }
        Err(e) if e.kind() == std::io::ErrorKind::PermissionDenied => {
            // A folder on the way does not let this user in.
            let folder = blocking_folder(path);
            return Err(denied(path, &folder, Want::Enter));
        }
        // Anything else is SQLite's to say.
        Err(_) => return Ok(()),
    }
    check_files(path, need)
}

#[cfg(unix)]
fn check_files(path: &Path, need: Need) -> StoreResult<()> {
    let want = match need {
        Need::Read => Want::Read,
        Need::ReadWrite => Want::ReadWrite,
    };
    if !may(path, want) {
        return Err(denied(path, path, want));
    }
    let mut missing = false;
    for suffix in ["-wal", "-shm"] {
        let side = side_file(path, suffix);
        if side.exists() {
            if !may(&side, want) {
                return Err(denied(path, &side, want));
            }
        } else {
            missing = true;
        }
    }
    // SQLite creates a missing -wal or -shm file beside the database.
    if need == Need::ReadWrite && missing {
        let folder = folder_of(path);
        if !may(&folder, Want::Create) {
            return Err(denied(path, &folder, Want::Create));
        }
    }
    Ok(())
}

#[cfg(not(unix))]
fn check_files(_path: &Path, _need: Need) -> StoreResult<()> {
    Ok(())
}

/// What the user must be allowed to do with one path.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Want {
    /// Pass through a folder.
    Enter,
    /// Read a file.
    Read,
    /// Read and write a file.
    ReadWrite,
    /// Create files in a folder.
    Create,
}

impl Want {
    fn words(self) -> &'static str {
        match self {
            Want::Enter => "enter the folder",
            Want::Read => "read",
            Want::ReadWrite => "read and write",
            Want::Create => "create files in the folder",
        }
    }

    /// The group permission bits this needs.
    fn group_bits(self) -> u32 {
        match self {
            Want::Enter => 0o010,
            Want::Read => 0o040,
            Want::ReadWrite => 0o060,
            Want::Create => 0o030,
        }
    }

    #[cfg(unix)]
    fn access_mode(self) -> libc::c_int {
        match self {
            Want::Enter => libc::X_OK,
            Want::Read => libc::R_OK,
            Want::ReadWrite => libc::R_OK | libc::W_OK,
            Want::Create => libc::W_OK | libc::X_OK,
        }
    }
}

/// Whether the kernel lets this process do `want` with `path`.
#[cfg(unix)]
fn may(path: &Path, want: Want) -> bool {
    use std::os::unix::ffi::OsStrExt;
    let Ok(c_path) = std::ffi::CString::new(path.as_os_str().as_bytes()) else {
        return true;
    };
    // SAFETY: access(2) reads the NUL-terminated path and nothing else.
    let refused = unsafe { libc::access(c_path.as_ptr(), want.access_mode()) } != 0;
    !(refused && std::io::Error::last_os_error().raw_os_error() == Some(libc::EACCES))
}

fn side_file(path: &Path, suffix: &str) -> PathBuf {
    let mut name = path.as_os_str().to_owned();
    name.push(suffix);
    PathBuf::from(name)
}

/// The folder holding `path` (the current one for a bare file name).
fn folder_of(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_owned(),
        _ => PathBuf::from("."),
    }
}

/// The nearest folder above `path` that this user can see but not pass
/// through.
fn blocking_folder(path: &Path) -> PathBuf {
    let mut folder = folder_of(path);
    loop {
        if std::fs::metadata(&folder).is_ok() {
            return folder;
        }
        match folder.parent() {
            Some(p) if !p.as_os_str().is_empty() => folder = p.to_owned(),
            _ => return folder,
        }
    }
}

fn denied(db: &Path, blocked: &Path, want: Want) -> StoreError {
    StoreError::Denied(Box::new(Denied {
        db: db.to_owned(),
        blocked: blocked.to_owned(),
        message: message(db, blocked, want),
    }))
}

#[cfg(unix)]
fn message(db: &Path, blocked: &Path, want: Want) -> String {
    use std::os::unix::fs::MetadataExt;
    let user = ids::user_name(unsafe { libc::getuid() });
    let subject = if blocked == db {
        String::new()
    } else {
        format!(", so it cannot use the database {}", db.display())
    };
    let Ok(meta) = std::fs::metadata(blocked) else {
        return format!(
            "permission denied: the user {user} may not {} {}{subject}",
            want.words(),
            blocked.display()
        );
    };
    let group = ids::group_name(meta.gid());
    let owner = ids::user_name(meta.uid());
    let mode = meta.mode() & 0o7777;
    let what = format!(
        "permission denied: the user {user} may not {} {} (owner {owner}, group {group}, mode {mode:04o}){subject}",
        want.words(),
        blocked.display(),
    );
    let needed = want.group_bits();
    let fix = if mode & needed != needed {
        // Even the group may not: a mode from an older install or a
        // stricter umask.
        let chmod = if meta.is_dir() {
            format!("`chmod 2770 {}`", blocked.display())
        } else {
            format!(
                "`chmod 0660 {}`, and the same for its -wal and -shm files",
                blocked.display()
            )
        };
        format!(
            "its group may not either; the shipped unit makes the folder 2770 and the files 0660 (UMask=0007); as root: {chmod}; README, \"Running it on a site\", has the set-up"
        )
    } else if ids::session_has_group(meta.gid()) {
        "ask the administrator to check its access control list".to_owned()
    } else if ids::listed_in_group(&user, meta.gid()) {
        format!(
            "{user} is in the group {group}, but this login session began before that: log out and in again (or run `newgrp {group}`)"
        )
    } else {
        format!(
            "operators must be in the database's group {group}: `sudo usermod -aG {group} {user}`, then log out and in again"
        )
    };
    format!("{what}; {fix}")
}

#[cfg(not(unix))]
fn message(db: &Path, blocked: &Path, want: Want) -> String {
    format!(
        "permission denied: this user may not {} {} (the database {})",
        want.words(),
        blocked.display(),
        db.display()
    )
}

#[cfg(unix)]
pub use ids::login_name;

/// Names of users and groups, from /etc/passwd and /etc/group (numbers
/// when a name is not there, as with a directory service).
#[cfg(unix)]
mod ids {
    fn field_table(path: &str) -> Vec<Vec<String>> {
        std::fs::read_to_string(path)
            .unwrap_or_default()
            .lines()
            .filter(|l| !l.starts_with('#'))
            .map(|l| l.split(':').map(str::to_owned).collect())
            .collect()
    }

    /// The login name of `uid`, if /etc/passwd has one.
    pub fn login_name(uid: u32) -> Option<String> {
        let uid = uid.to_string();
        field_table("/etc/passwd")
            .into_iter()
            .find(|f| f.len() > 2 && f[2] == uid)
            .map(|mut f| f.swap_remove(0))
    }

    pub fn user_name(uid: u32) -> String {
        login_name(uid).unwrap_or_else(|| format!("uid {uid}"))
    }

    pub fn group_name(gid: u32) -> String {
        field_table("/etc/group")
            .into_iter()
            .find(|f| f.len() > 2 && f[2] == gid.to_string())
            .map_or_else(|| gid.to_string(), |f| f[0].clone())
    }

    /// Whether `user` is a member of `gid` by /etc/group or as its
    /// primary group in /etc/passwd.
    pub fn listed_in_group(user: &str, gid: u32) -> bool {
        let gid_text = gid.to_string();
        let member = field_table("/etc/group")
            .into_iter()
            .any(|f| f.len() > 3 && f[2] == gid_text && f[3].split(',').any(|m| m.trim() == user));
        member
            || field_table("/etc/passwd")
                .into_iter()
                .any(|f| f.len() > 3 && f[0] == user && f[3] == gid_text)
    }

    /// Whether this process holds `gid` now.
    pub fn session_has_group(gid: u32) -> bool {
        // SAFETY: getegid has no preconditions; getgroups writes at most
        // the buffer's length of ids.
        if unsafe { libc::getegid() } == gid {
            return true;
        }
        let mut groups = vec![0 as libc::gid_t; 256];
        let n = unsafe { libc::getgroups(groups.len() as libc::c_int, groups.as_mut_ptr()) };
        n > 0 && groups[..n as usize].contains(&gid)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_missing_database_is_missing_not_denied() {
        let path = std::env::temp_dir().join("leaktally-access-no-such-folder/site.db");
        assert!(matches!(
            check(&path, Need::ReadWrite),
            Err(StoreError::Missing(_))
        ));
    }

    #[test]
    fn side_files_and_folders() {
        assert_eq!(
            side_file(Path::new("/var/lib/x/site.db"), "-wal"),
            PathBuf::from("/var/lib/x/site.db-wal")
        );
        assert_eq!(folder_of(Path::new("site.db")), PathBuf::from("."));
        assert_eq!(
            folder_of(Path::new("/var/lib/x/site.db")),
            PathBuf::from("/var/lib/x")
        );
    }
}
