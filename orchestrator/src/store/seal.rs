//! The seal of a cleanly closed database: a small file beside `rondo.db` that records the
//! database file's identity (device, inode, size, modification and change times in ns) at
//! the moment the last `rondo run` closed it with nothing left in its write-ahead log.
//!
//! A start that finds the seal matching the file skips the page-by-page `quick_check`
//! (linear in the file's size: seconds for a store of a million attempts), because nothing
//! has written the file since it was last known good. Anything else — no seal (a crash, a
//! first run, an older rondo), a seal that does not match (any write changes the change
//! time, which `touch` cannot set back), a non-empty `-wal` or a `-journal` — means the full
//! check runs. The seal is removed before the run writes anything, so only a clean end
//! leaves one. Owns only the seal file; never opens the database.

use std::os::unix::fs::MetadataExt;
use std::path::{Path, PathBuf};

const FORMAT: &str = "rondo-seal-1";

fn seal_path(db: &Path) -> PathBuf {
    let mut p = db.as_os_str().to_owned();
    p.push(".sealed");
    PathBuf::from(p)
}

fn side_file(db: &Path, suffix: &str) -> PathBuf {
    let mut p = db.as_os_str().to_owned();
    p.push(suffix);
    PathBuf::from(p)
}

/// The identity line of the database file, or None when it (or a pending log) says the
/// file is not in a closed state.
fn identity(db: &Path) -> Option<String> {
    let m = std::fs::metadata(db).ok()?;
    for (suffix, empty_ok) in [("-wal", true), ("-journal", false)] {
        if let Ok(side) = std::fs::metadata(side_file(db, suffix)) {
            if !(empty_ok && side.len() == 0) {
                return None;
            }
        }
    }
    Some(format!(
        "{FORMAT} dev={} ino={} size={} mtime={}.{:09} ctime={}.{:09}",
        m.dev(),
        m.ino(),
        m.len(),
        m.mtime(),
        m.mtime_nsec(),
        m.ctime(),
        m.ctime_nsec()
    ))
}

/// Whether the database file is exactly as a clean close left it.
pub fn matches(db: &Path) -> bool {
    let Ok(text) = std::fs::read_to_string(seal_path(db)) else {
        return false;
    };
    identity(db).is_some_and(|id| text.trim_end() == id)
}

/// Remove the seal before anything writes the database (an absent seal is fine).
pub fn break_seal(db: &Path) -> std::io::Result<()> {
    match std::fs::remove_file(seal_path(db)) {
        Err(e) if e.kind() != std::io::ErrorKind::NotFound => Err(e),
        _ => Ok(()),
    }
}

/// Record the closed database's identity. Best effort: a seal that cannot be written only
/// means the next start checks every page.
pub fn seal(db: &Path) {
    let Some(id) = identity(db) else { return };
    let path = seal_path(db);
    let tmp = side_file(db, ".sealed.tmp");
    if std::fs::write(&tmp, format!("{id}\n")).is_ok() && std::fs::rename(&tmp, &path).is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_seal_matches_only_the_untouched_file() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("rondo.db");
        std::fs::write(&db, b"pages").unwrap();
        assert!(!matches(&db), "no seal yet");
        seal(&db);
        assert!(matches(&db));
        // An empty write-ahead log (a reader left it) keeps the seal; a non-empty one breaks it.
        std::fs::write(side_file(&db, "-wal"), b"").unwrap();
        assert!(matches(&db));
        std::fs::write(side_file(&db, "-wal"), b"frames").unwrap();
        assert!(!matches(&db));
        std::fs::remove_file(side_file(&db, "-wal")).unwrap();
        assert!(matches(&db));
        // Same size, other content, modification time put back: the change time differs.
        let before = std::fs::metadata(&db).unwrap();
        std::thread::sleep(std::time::Duration::from_millis(20));
        std::fs::write(&db, b"PAGES").unwrap();
        let mtime = filetime_of(&before);
        set_mtime(&db, mtime);
        assert!(!matches(&db), "a rewrite is noticed");
        seal(&db);
        assert!(matches(&db));
        break_seal(&db).unwrap();
        assert!(!matches(&db));
        break_seal(&db).unwrap();
    }

    fn filetime_of(m: &std::fs::Metadata) -> libc::timespec {
        libc::timespec {
            tv_sec: m.mtime(),
            tv_nsec: m.mtime_nsec(),
        }
    }

    fn set_mtime(path: &Path, t: libc::timespec) {
        use std::os::unix::ffi::OsStrExt;
        let c = std::ffi::CString::new(path.as_os_str().as_bytes()).unwrap();
        let times = [t, t];
        // SAFETY: a valid path and two valid timespecs.
        let rc = unsafe { libc::utimensat(libc::AT_FDCWD, c.as_ptr(), times.as_ptr(), 0) };
        assert_eq!(rc, 0);
    }
}
