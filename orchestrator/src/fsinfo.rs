//! What the workspace's file system is and what that allows: local or network (from
//! `statfs`), the SQLite journal mode that is safe there, and the workspace lock's record
//! (host, pid, boot id) with the rule that decides when a lock left behind is provably stale.
//!
//! Owns no SQL and no file of the workspace: the store asks it and acts.
//!
//! Why it matters: SQLite's write-ahead log keeps its index in shared memory (`-shm`), which
//! only works when every process that opens the database is on one host. A workspace on a
//! cluster file system is opened by `rondo run` inside an allocation on a compute node and
//! by `rondo status` on a login node, so there the store uses a rollback journal instead.
//! A lock file on such a file system can also outlive its holder (a node that crashed), so
//! the lock records who took it, and a lock is broken only when that holder can be shown to
//! be gone: the same host and either another boot or a pid that no longer runs.

use std::ffi::CString;
use std::path::Path;

/// The kind of file system a path lives on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FsKind {
    /// A file system of this host only (ext4, xfs, btrfs, tmpfs, overlay, …).
    Local(&'static str),
    /// A file system shared between hosts (NFS, SMB, Lustre, GPFS, BeeGFS, CephFS, …).
    Network(&'static str),
    /// A magic number this table does not know (treated as possibly shared).
    Unknown(u64),
}

impl FsKind {
    /// Whether another host may open the same files.
    pub fn may_be_shared(self) -> bool {
        !matches!(self, FsKind::Local(_))
    }

    /// A name for messages.
    pub fn name(self) -> String {
        match self {
            FsKind::Local(n) | FsKind::Network(n) => n.to_string(),
            FsKind::Unknown(m) => format!("unknown file system (statfs type {m:#x})"),
        }
    }
}

/// `statfs` magic numbers, from the Linux kernel's `include/uapi/linux/magic.h` and the
/// file systems' own sources (a fact of the trade; the values are written here from that
/// header as known, not looked up at build time). FUSE is listed as unknown-shared: a FUSE
/// file system may be anything, sshfs and many cluster clients among them.
const KNOWN: &[(u64, FsKind)] = &[
    (0xEF53, FsKind::Local("ext2/3/4")),
    (0x5846_5342, FsKind::Local("xfs")),
    (0x9123_683E, FsKind::Local("btrfs")),
    (0x0102_1994, FsKind::Local("tmpfs")),
    (0x794C_7630, FsKind::Local("overlayfs")),
    (0x2FC1_2FC1, FsKind::Local("zfs")),
    (0xF2F5_2010, FsKind::Local("f2fs")),
    (0x4D44, FsKind::Local("vfat")),
    (0x6969, FsKind::Network("nfs")),
    (0x517B, FsKind::Network("smb")),
    (0xFF53_4D42, FsKind::Network("cifs")),
    (0xFE53_4D42, FsKind::Network("smb2")),
    (0x0BD0_0BD0, FsKind::Network("lustre")),
    (0x4750_4653, FsKind::Network("gpfs")),
    (0x1983_0326, FsKind::Network("beegfs")),
    (0x00C3_6400, FsKind::Network("cephfs")),
    (0x5346_414F, FsKind::Network("afs")),
    (0x0102_1997, FsKind::Network("9p")),
    (0x2003_0528, FsKind::Network("orangefs")),
    (0x6573_5546, FsKind::Network("fuse")),
];

/// The kind of file system with this `statfs` type.
pub fn classify(f_type: u64) -> FsKind {
    KNOWN
        .iter()
        .find(|(m, _)| *m == f_type)
        .map(|(_, k)| *k)
        .unwrap_or(FsKind::Unknown(f_type))
}

/// The kind of file system `path` lives on.
pub fn detect(path: &Path) -> std::io::Result<FsKind> {
    use std::os::unix::ffi::OsStrExt;
    let c = CString::new(path.as_os_str().as_bytes())
        .map_err(|e| std::io::Error::new(std::io::ErrorKind::InvalidInput, e))?;
    // SAFETY: `c` is a valid NUL-terminated path; `buf` is a properly sized, zeroed statfs
    // that the call fills in; no pointer outlives the call.
    let mut buf: libc::statfs = unsafe { std::mem::zeroed() };
    let r = unsafe { libc::statfs(c.as_ptr(), &mut buf) };
    if r != 0 {
        return Err(std::io::Error::last_os_error());
    }
    // f_type's integer type differs between targets; the magic numbers fit in 32 bits.
    #[allow(clippy::unnecessary_cast)]
    let t = (buf.f_type as i64 as u64) & 0xFFFF_FFFF;
    Ok(classify(t))
}

/// Why the folder `path` cannot be written now, if it cannot: its file system is mounted
/// read-only (`statvfs`'s `ST_RDONLY`), or creating a file in it fails with EROFS (a file
/// system that turned itself read-only after an error while still listed as mounted
/// read-write) or EIO. None when a probe file can be created (and is removed again).
pub fn unwritable_now(path: &Path) -> Option<String> {
    use std::os::unix::ffi::OsStrExt;
    let c = CString::new(path.as_os_str().as_bytes()).ok()?;
    // SAFETY: `c` is a valid NUL-terminated path; `buf` is a zeroed statvfs the call fills.
    let mut buf: libc::statvfs = unsafe { std::mem::zeroed() };
    if unsafe { libc::statvfs(c.as_ptr(), &mut buf) } == 0 && buf.f_flag & libc::ST_RDONLY != 0 {
        return Some("its file system is mounted read-only".into());
    }
    let probe = path.join(format!(".rondo-probe-{}", std::process::id()));
    match std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&probe)
    {
        Ok(_) => {
            let _ = std::fs::remove_file(&probe);
            None
        }
        Err(e) if e.raw_os_error() == Some(libc::EROFS) => {
            Some("its file system became read-only (EROFS on a new file)".into())
        }
        Err(e) if e.raw_os_error() == Some(libc::EIO) => {
            Some("its file system fails with I/O errors (EIO on a new file)".into())
        }
        Err(_) => None,
    }
}

/// How the store journals its transactions.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Journal {
    /// Write-ahead log: fast commits, concurrent readers, one host only.
    Wal,
    /// Rollback journal (`journal_mode=DELETE`, `synchronous=FULL`): slower commits, safe
    /// when readers on other hosts open the same file.
    Rollback,
}

/// The journal mode for a workspace on `kind`, unless `RONDO_JOURNAL` (`wal` or `rollback`)
/// says otherwise; returns the choice and why, for the run's log and `rondo status`.
pub fn journal_for(kind: FsKind, env: Option<&str>) -> Result<(Journal, String), String> {
    match env.map(str::trim) {
        Some("wal") => Ok((Journal::Wal, "RONDO_JOURNAL=wal".into())),
        Some("rollback") => Ok((Journal::Rollback, "RONDO_JOURNAL=rollback".into())),
        Some(other) => Err(format!(
            "RONDO_JOURNAL={other:?}: expected `wal` or `rollback`; unset it to let rondo choose"
        )),
        None if kind.may_be_shared() => Ok((
            Journal::Rollback,
            format!(
                "the workspace is on {}, which other hosts may open: the write-ahead log needs \
                 shared memory on one host",
                kind.name()
            ),
        )),
        None => Ok((Journal::Wal, format!("the workspace is on {}", kind.name()))),
    }
}

/// Who took the workspace lock: written into the lock file when it is taken.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LockRecord {
    /// Process id of the holder.
    pub pid: u32,
    /// Host name of the holder.
    pub host: String,
    /// `/proc/sys/kernel/random/boot_id` of the holder's host at the time (absent in locks
    /// written by older versions).
    pub boot_id: Option<String>,
}

impl LockRecord {
    /// This process's record.
    pub fn this_process(host: String) -> Self {
        LockRecord {
            pid: std::process::id(),
            host,
            boot_id: boot_id(),
        }
    }

    /// The lock file's text: one `key value` per line.
    pub fn to_text(&self) -> String {
        let mut s = format!("pid {}\nhost {}\n", self.pid, self.host);
        if let Some(b) = &self.boot_id {
            s.push_str(&format!("boot-id {b}\n"));
        }
        s
    }

    /// Read a lock file's text (this format, or the older one-line `pid N on host H`).
    pub fn parse(text: &str) -> Option<Self> {
        let t = text.trim();
        if let Some(rest) = t.strip_prefix("pid ") {
            if let Some((pid, host)) = rest.split_once(" on host ") {
                if !host.contains('\n') {
                    return Some(LockRecord {
                        pid: pid.trim().parse().ok()?,
                        host: host.trim().to_string(),
                        boot_id: None,
                    });
                }
            }
        }
        let (mut pid, mut host, mut boot) = (None, None, None);
        for line in t.lines() {
            match line.split_once(' ') {
                Some(("pid", v)) => pid = v.trim().parse().ok(),
                Some(("host", v)) => host = Some(v.trim().to_string()),
                Some(("boot-id", v)) => boot = Some(v.trim().to_string()),
                _ => {}
            }
        }
        Some(LockRecord {
            pid: pid?,
            host: host?,
            boot_id: boot,
        })
    }

    /// For messages: `pid 123 on host node7`.
    pub fn describe(&self) -> String {
        format!("pid {} on host {}", self.pid, self.host)
    }
}

/// What can be said of a lock that is held (or whose file is there) from its record.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Holder {
    /// The holder runs (or cannot be shown not to): the lock must be respected.
    Alive(String),
    /// The holder is provably gone; the lock may be broken. The reason says how we know.
    Gone(String),
}

/// Judge a lock record from this host's point of view. Only a holder on this host can be
/// shown to be gone: another boot of this host, or a pid that is not running. A holder on
/// another host is always taken as alive (rondo cannot look into another machine; the
/// message says how the user can check).
pub fn judge(
    rec: &LockRecord,
    this_host: &str,
    this_boot: Option<&str>,
    pid_running: impl Fn(u32) -> bool,
) -> Holder {
    if rec.host != this_host {
        return Holder::Alive(format!(
            "{} (another host: check there, e.g. `ssh {} ps -p {}`, and end it before using this workspace)",
            rec.describe(),
            rec.host,
            rec.pid
        ));
    }
    if let (Some(theirs), Some(ours)) = (rec.boot_id.as_deref(), this_boot) {
        if theirs != ours {
            return Holder::Gone(format!(
                "{} was taken before this host last booted (boot id {theirs}, now {ours})",
                rec.describe()
            ));
        }
    }
    if !pid_running(rec.pid) {
        return Holder::Gone(format!("{}: no such process on this host", rec.describe()));
    }
    Holder::Alive(rec.describe())
}

/// This host's boot id (Linux), if readable.
pub fn boot_id() -> Option<String> {
    std::fs::read_to_string("/proc/sys/kernel/random/boot_id")
        .ok()
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
}

/// Whether a process with this pid exists on this host (`kill(pid, 0)`; EPERM means it
/// exists but belongs to someone else).
pub fn pid_running(pid: u32) -> bool {
    let Ok(p) = libc::pid_t::try_from(pid) else {
        return false;
    };
    if p <= 0 {
        return false;
    }
    // SAFETY: signal 0 performs only the existence and permission check.
    let r = unsafe { libc::kill(p, 0) };
    r == 0 || std::io::Error::last_os_error().raw_os_error() == Some(libc::EPERM)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn magic_numbers_name_local_and_shared_file_systems() {
        assert_eq!(classify(0xEF53), FsKind::Local("ext2/3/4"));
        assert_eq!(classify(0x6969), FsKind::Network("nfs"));
        assert_eq!(classify(0x0BD0_0BD0), FsKind::Network("lustre"));
        assert_eq!(classify(0x4750_4653), FsKind::Network("gpfs"));
        assert!(
            classify(0x6573_5546).may_be_shared(),
            "fuse may be anything"
        );
        assert_eq!(classify(0x1234_5678), FsKind::Unknown(0x1234_5678));
        assert!(FsKind::Unknown(1).may_be_shared());
    }

    #[test]
    fn this_machines_temp_and_shm_are_local() {
        // /dev/shm is tmpfs on every Linux with POSIX shared memory; the temp dir is on
        // the machine's own disk here (CI and development machines have no network mounts).
        assert_eq!(
            detect(Path::new("/dev/shm")).expect("statfs"),
            FsKind::Local("tmpfs")
        );
        let t = tempfile::tempdir().expect("tempdir");
        let k = detect(t.path()).expect("statfs");
        assert!(!k.may_be_shared(), "{k:?}");
        assert!(detect(Path::new("/no/such/dir")).is_err());
    }

    #[test]
    fn journal_mode_follows_the_file_system_unless_overridden() {
        let local = FsKind::Local("ext2/3/4");
        let nfs = FsKind::Network("nfs");
        assert_eq!(journal_for(local, None).map(|j| j.0), Ok(Journal::Wal));
        let (j, why) = journal_for(nfs, None).expect("choice");
        assert_eq!(j, Journal::Rollback);
        assert!(
            why.contains("nfs") && why.contains("shared memory"),
            "{why}"
        );
        assert_eq!(
            journal_for(FsKind::Unknown(7), None).map(|j| j.0),
            Ok(Journal::Rollback)
        );
        assert_eq!(journal_for(nfs, Some("wal")).map(|j| j.0), Ok(Journal::Wal));
        assert_eq!(
            journal_for(local, Some("rollback")).map(|j| j.0),
            Ok(Journal::Rollback)
        );
        let e = journal_for(local, Some("memory")).expect_err("refused");
        assert!(e.contains("RONDO_JOURNAL") && e.contains("wal"), "{e}");
    }

    #[test]
    fn lock_records_round_trip_and_old_ones_parse() {
        let r = LockRecord {
            pid: 4242,
            host: "node-7.cluster".into(),
            boot_id: Some("0f6c-aa".into()),
        };
        assert_eq!(LockRecord::parse(&r.to_text()), Some(r));
        assert_eq!(
            LockRecord::parse("pid 17 on host login1\n"),
            Some(LockRecord {
                pid: 17,
                host: "login1".into(),
                boot_id: None
            })
        );
        assert_eq!(LockRecord::parse(""), None);
        assert_eq!(LockRecord::parse("pid x\nhost h\n"), None);
        let me = LockRecord::this_process("h".into());
        assert_eq!(me.pid, std::process::id());
        assert!(me.boot_id.is_some(), "Linux has a boot id");
    }

    #[test]
    fn only_a_holder_on_this_host_can_be_judged_gone() {
        let rec = |host: &str, boot: Option<&str>| LockRecord {
            pid: 100,
            host: host.into(),
            boot_id: boot.map(Into::into),
        };
        let running = |_| true;
        let dead = |_| false;
        // Another host: alive whatever its pid, with a hint how to check.
        match judge(&rec("other", Some("b1")), "me", Some("b1"), dead) {
            Holder::Alive(m) => assert!(m.contains("ssh other ps -p 100"), "{m}"),
            g => panic!("{g:?}"),
        }
        // This host, another boot: gone even if a process 100 runs now (pids are reused).
        assert!(matches!(
            judge(&rec("me", Some("b0")), "me", Some("b1"), running),
            Holder::Gone(m) if m.contains("before this host last booted")
        ));
        // This host, this boot: decided by the pid.
        assert!(matches!(
            judge(&rec("me", Some("b1")), "me", Some("b1"), dead),
            Holder::Gone(_)
        ));
        assert!(matches!(
            judge(&rec("me", Some("b1")), "me", Some("b1"), running),
            Holder::Alive(_)
        ));
        // An old record without a boot id: the pid decides.
        assert!(matches!(
            judge(&rec("me", None), "me", Some("b1"), dead),
            Holder::Gone(_)
        ));
        // The real check on this host.
        assert!(pid_running(std::process::id()));
        assert!(!pid_running(0));
        assert!(!pid_running(u32::MAX));
    }
}
