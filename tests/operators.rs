//! Operators act without root, as the shipped unit sets things up: the
//! daemon runs as a user of its own with umask 0007 in a setgid 2770
//! folder, an operator in the daemon's group opens a leak and reads
//! `status`, and a user outside the group is refused with a message that
//! says which path and how to join the group.
//!
//! The users are real: the test creates (once, and again harmlessly) the
//! group `lt-test-leaktally` and the users `lt-test-daemon` (in it, as its
//! primary group), `lt-test-operator` (in it, besides a group of its own)
//! and `lt-test-outsider` (not in it), and runs each command through
//! util-linux's `setpriv`, which Debian always has. That takes root: without
//! it, or without `useradd`, the test says SKIPPED, unless
//! LEAKTALLY_REQUIRE_USERS is set (`.ci/run` sets it when it runs as root).

use crate::tracking::{event_id, event_of, three_leaks};
use crate::util::{Finished, Scratch, Server, binary, demo_site, now_ms, run, skipped, start_sim};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

/// The daemon's group, as `leaktally` is on a site.
const GROUP: &str = "lt-test-leaktally";
/// The daemon's user.
const DAEMON: &str = "lt-test-daemon";
/// An operator: in [`GROUP`].
const OPERATOR: &str = "lt-test-operator";
/// Someone else on the box: not in [`GROUP`].
const OUTSIDER: &str = "lt-test-outsider";

/// Why users cannot be made here, if they cannot.
fn cannot_make_users() -> Option<String> {
    let uid = Command::new("id").arg("-u").output().ok()?;
    if String::from_utf8_lossy(&uid.stdout).trim() != "0" {
        return Some("it needs root to create users (run as root)".into());
    }
    for tool in ["useradd", "groupadd", "usermod", "setpriv"] {
        if Command::new(tool).arg("--help").output().is_err() {
            return Some(format!("it needs `{tool}`, which is not installed"));
        }
    }
    None
}

/// Runs an administration command, retrying while another one holds the
/// password files' lock (another test run on the same box).
fn admin(args: &[&str]) {
    let mut last = String::new();
    for _ in 0..20 {
        let out = Command::new(args[0])
            .args(&args[1..])
            .output()
            .unwrap_or_else(|e| panic!("running {args:?}: {e}"));
        if out.status.success() {
            return;
        }
        last = String::from_utf8_lossy(&out.stderr).into_owned();
        std::thread::sleep(Duration::from_millis(250));
    }
    panic!("{args:?} failed: {last}");
}

fn exists(database: &str, name: &str) -> bool {
    Command::new("getent")
        .args([database, name])
        .output()
        .is_ok_and(|o| o.status.success())
}

/// Creates the group and the three users unless they exist; puts the
/// operator in the group and makes sure the outsider is not.
fn make_users() {
    if !exists("group", GROUP) {
        let _ = Command::new("groupadd").args(["--system", GROUP]).output();
        if !exists("group", GROUP) {
            admin(&["groupadd", "--system", GROUP]);
        }
    }
    let nologin = "/usr/sbin/nologin";
    for (user, extra) in [
        (DAEMON, vec!["--gid", GROUP]),
        (OPERATOR, vec!["--user-group", "--groups", GROUP]),
        (OUTSIDER, vec!["--user-group"]),
    ] {
        if exists("passwd", user) {
            continue;
        }
        let mut args = vec![
            "useradd",
            "--system",
            "--no-create-home",
            "--home-dir",
            "/nonexistent",
            "--shell",
            nologin,
        ];
        args.extend(extra);
        args.push(user);
        let _ = Command::new(args[0]).args(&args[1..]).output();
        if !exists("passwd", user) {
            admin(&args);
        }
    }
    admin(&["usermod", "--append", "--groups", GROUP, OPERATOR]);
    // Harmless when it is not a member.
    let _ = Command::new("gpasswd")
        .args(["--delete", OUTSIDER, GROUP])
        .output();
}

/// The primary group id of `user`.
fn primary_gid(user: &str) -> String {
    let out = Command::new("id").args(["-g", user]).output().unwrap();
    String::from_utf8_lossy(&out.stdout).trim().to_owned()
}

/// A command that runs `program` as `user` with the groups the system
/// gives it at login (or none but its own with `init_groups` false: a
/// session that began before it joined a group), and umask 0007, as the
/// shipped unit runs the daemon. The environment says who it is, as a
/// login would.
fn as_user(user: &str, init_groups: bool, program: &Path) -> Command {
    let mut command = Command::new("sh");
    command
        .args(["-c", "umask 0007; exec \"$@\"", "sh", "setpriv"])
        .arg(format!("--reuid={user}"))
        .arg(format!("--regid={}", primary_gid(user)))
        .arg(if init_groups {
            "--init-groups"
        } else {
            "--clear-groups"
        })
        .arg(program)
        .env("USER", user)
        .env("LOGNAME", user)
        .env("HOME", "/");
    command
}

/// The mode and group of a path.
fn mode_and_group(path: &Path) -> (u32, u32) {
    use std::os::unix::fs::MetadataExt;
    let meta = std::fs::metadata(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    (meta.mode() & 0o7777, meta.gid())
}

fn group_id(name: &str) -> u32 {
    let out = Command::new("getent")
        .args(["group", name])
        .output()
        .unwrap();
    String::from_utf8_lossy(&out.stdout)
        .split(':')
        .nth(2)
        .and_then(|g| g.trim().parse().ok())
        .unwrap_or_else(|| panic!("no gid for {name}"))
}

/// The leaktally binary where the test users can run it: the build's own
/// when they can reach it, else a copy in the scratch folder.
fn reachable_binary(scratch: &Scratch) -> PathBuf {
    let built = binary("leaktally");
    let reach = as_user(OUTSIDER, true, Path::new("/bin/test"))
        .arg("-x")
        .arg(&built)
        .status()
        .is_ok_and(|s| s.success());
    if reach {
        return built;
    }
    let copy = scratch.path("bin/leaktally");
    std::fs::create_dir_all(copy.parent().unwrap()).unwrap();
    std::fs::copy(&built, &copy).expect("copying the binary");
    set_mode(copy.parent().unwrap(), 0o755);
    set_mode(&copy, 0o755);
    copy
}

fn set_mode(path: &Path, mode: u32) {
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(mode))
        .unwrap_or_else(|e| panic!("chmod {}: {e}", path.display()));
}

fn said(done: &Finished) -> String {
    format!(
        "exit {}\nstdout:\n{}\nstderr:\n{}",
        done.status, done.stdout, done.stderr
    )
}

#[test]
fn an_operator_in_the_group_acts_and_an_outsider_is_told_how_to_join() {
    if let Some(why) = cannot_make_users() {
        assert!(
            std::env::var_os("LEAKTALLY_REQUIRE_USERS").is_none(),
            "the operator-group test cannot run although LEAKTALLY_REQUIRE_USERS is set: {why}"
        );
        skipped("the operator-group test", &why);
        return;
    }
    make_users();
    let scratch = Scratch::new("operators");
    // /tmp's own scratch folders are made with the test's umask; the test
    // users must be able to pass through this one and read the config.
    set_mode(&scratch.0, 0o755);
    let program = reachable_binary(&scratch);

    let scenario = three_leaks().write(&scratch);
    let (_sim, address) = start_sim(&scratch, &scenario, "127.0.0.1:0");
    let site = scratch.write("site.toml", &demo_site(&address));
    set_mode(&site, 0o644);

    // The state folder as systemd makes it for StateDirectory= with
    // StateDirectoryMode=2770: owned by the daemon's user and group,
    // setgid, nothing for others.
    let state = scratch.path("state");
    std::fs::create_dir(&state).unwrap();
    admin(&[
        "chown",
        &format!("{DAEMON}:{GROUP}"),
        &state.to_string_lossy(),
    ]);
    set_mode(&state, 0o2770);
    let db = state.join("site.db");

    let mut daemon_command = as_user(DAEMON, true, &program);
    daemon_command
        .arg("run")
        .arg("--config")
        .arg(&site)
        .arg("--db")
        .arg(&db);
    let mut daemon = Server::start(
        "leaktally run (as lt-test-daemon)",
        &mut daemon_command,
        scratch.path("daemon.stderr"),
    );
    let deadline = Instant::now() + Duration::from_secs(15);
    loop {
        let alive = leaktally::store::open_read_only(&db)
            .ok()
            .and_then(|c| leaktally::store::heartbeat(&c).ok().flatten())
            .is_some_and(|h| h.stopped_at_ms.is_none() && now_ms() - h.beat_at_ms < 3000);
        if alive {
            break;
        }
        if let Ok(Some(status)) = daemon.child.try_wait() {
            panic!(
                "the daemon exited ({status}); its stderr:\n{}",
                daemon.stderr()
            );
        }
        assert!(
            Instant::now() < deadline,
            "the daemon did not start; its stderr:\n{}",
            daemon.stderr()
        );
        std::thread::sleep(Duration::from_millis(100));
    }

    // The operator opens a leak: acknowledged, and the event is there.
    let db_arg = db.to_string_lossy().into_owned();
    let open = run(
        "operator-open",
        as_user(OPERATOR, true, &program)
            .args([
                "leak",
                "open",
                "--tank",
                "FF-T12",
                "--since",
                "5s",
                "--note",
                "seen from the control room",
                "--db",
                &db_arg,
            ])
            // USER is the operator's to set; the audit trail names the real uid.
            .env("USER", "somebody-else"),
        &scratch,
    );
    assert!(
        open.status.success(),
        "the operator's open: {}",
        said(&open)
    );
    println!("operator's open: {}", open.stdout.trim());
    let id = event_id(&open.stdout);
    let conn = leaktally::store::open_read_only(&db).unwrap();
    let actions = leaktally::store::actions_of(&conn, id).unwrap();
    assert_eq!(actions.len(), 1, "{actions:?}");
    assert_eq!(actions[0].state, "done", "{actions:?}");
    assert_eq!(actions[0].os_user, OPERATOR, "{actions:?}");
    drop(conn);

    let status = run(
        "operator-status",
        as_user(OPERATOR, true, &program).args(["status", "--json", "--db", &db_arg]),
        &scratch,
    );
    assert!(
        status.status.success(),
        "the operator's status: {}",
        said(&status)
    );
    let doc: serde_json::Value = serde_json::from_str(&status.stdout).expect("status JSON");
    assert_eq!(event_of(&doc, id)["state"], "open", "{doc}");
    println!("operator's status lists event {id}, open");

    // Everything in the folder belongs to the group and nobody else.
    let gid = group_id(GROUP);
    for name in ["", "site.db", "site.db-wal", "site.db-shm"] {
        let path = if name.is_empty() {
            state.clone()
        } else {
            state.join(name)
        };
        let (mode, group) = mode_and_group(&path);
        println!("{}: mode {mode:04o}, group {group}", path.display());
        assert_eq!(group, gid, "{}'s group", path.display());
        assert_eq!(mode & 0o007, 0, "{} is open to others", path.display());
        let group_bits = if name.is_empty() { 0o070 } else { 0o060 };
        assert_eq!(
            mode & group_bits,
            group_bits,
            "{} is not open to its group",
            path.display()
        );
    }

    // An outsider is refused, with the way in.
    let id_arg = id.to_string();
    for (label, args) in [
        (
            "outsider-note",
            vec!["leak", "note", &id_arg, "not mine to say"],
        ),
        ("outsider-status", vec!["status"]),
    ] {
        let done = run(
            label,
            as_user(OUTSIDER, true, &program)
                .args(&args)
                .args(["--db", &db_arg]),
            &scratch,
        );
        println!("{label}: {}", done.stderr.trim());
        assert!(!done.status.success(), "{label}: {}", said(&done));
        for words in [
            "permission denied",
            &*state.to_string_lossy(),
            &*format!("sudo usermod -aG {GROUP} {OUTSIDER}"),
            "log out and in again",
        ] {
            assert!(
                done.stderr.contains(words),
                "{label} lacks {words:?}: {}",
                said(&done)
            );
        }
        assert!(!done.stderr.contains("does not exist"), "{}", said(&done));
    }
    // An operator whose session began before joining: told to log in again.
    let stale = run(
        "operator-stale-session",
        as_user(OPERATOR, false, &program).args(["status", "--db", &db_arg]),
        &scratch,
    );
    println!("operator-stale-session: {}", stale.stderr.trim());
    assert!(!stale.status.success(), "{}", said(&stale));
    assert!(
        stale
            .stderr
            .contains(&format!("{OPERATOR} is in the group {GROUP}"))
            && stale.stderr.contains("log out and in again"),
        "{}",
        said(&stale)
    );

    // A database left 0640 by an older install (UMask=0027): even the
    // group may not write, and the operator is told the mode to set, not
    // to join a group it is in.
    set_mode(&db, 0o640);
    let old_mode = run(
        "operator-old-mode",
        as_user(OPERATOR, true, &program).args([
            "leak",
            "note",
            &id_arg,
            "after the mode changed",
            "--db",
            &db_arg,
        ]),
        &scratch,
    );
    set_mode(&db, 0o660);
    println!("operator-old-mode: {}", old_mode.stderr.trim());
    assert!(!old_mode.status.success(), "{}", said(&old_mode));
    assert!(
        old_mode.stderr.contains("may not read and write")
            && old_mode.stderr.contains("mode 0640")
            && old_mode
                .stderr
                .contains(&format!("chmod 0660 {}", db.display()))
            && !old_mode.stderr.contains("usermod"),
        "{}",
        said(&old_mode)
    );

    // Neither refused note reached the database.
    let conn = leaktally::store::open_read_only(&db).unwrap();
    assert_eq!(leaktally::store::actions_of(&conn, id).unwrap().len(), 1);
    drop(conn);

    // Nothing of the daemon went wrong, and it stops cleanly.
    assert!(
        daemon.child.try_wait().unwrap().is_none(),
        "{}",
        daemon.stderr()
    );
    // The child is the shell's exec'd setpriv's exec'd leaktally: one pid.
    daemon.stop_cleanly();
}
