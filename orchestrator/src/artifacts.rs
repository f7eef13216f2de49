//! The content-addressed artifact store: files named by their BLAKE3 hash under
//! `<workspace>/store/<2 hex>/<rest>`, written to a temporary name, synced and renamed, so a
//! crash leaves either no file or a complete one; identical content is stored once.
//!
//! Large files are never copied when that can be avoided: an output enters the store as a
//! hard link when the scratch folder is on the same file system (file and folder fsynced),
//! and is copied then fsynced only across file systems; an input is placed by hard link (or a
//! copy-on-write clone) of the read-only stored file, and copied only when neither works or
//! when the stage asked for a private, writable copy. Files of 32 MiB and more are hashed
//! with BLAKE3's multi-threaded mode over a memory map. Folders are stored as manifests
//! ([`folder`]).

use std::fs::{self, File};
use std::io::{self, Read, Write};
use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};

pub mod folder;
pub use folder::{FolderError, Manifest, StoredFolder};

/// From this size on, files are hashed over a memory map on all cores.
pub const PARALLEL_HASH_FROM: u64 = 32 << 20;

/// How an input file was put in place.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Placement {
    /// A hard link to the stored (read-only) file: no data written.
    Linked,
    /// A copy-on-write clone (`FICLONE`): no data written until the stage writes.
    Cloned,
    /// A full copy.
    Copied,
}

/// The store folder of one workspace.
#[derive(Debug, Clone)]
pub struct ArtifactStore {
    root: PathBuf,
    /// Artifacts whose content was hashed against their name in this process, with the
    /// (size, mtime, inode) seen then: a later use re-hashes only when one of them changed.
    verified: std::sync::Arc<std::sync::Mutex<std::collections::HashMap<String, FileStamp>>>,
}

/// What a cheap `stat` tells of a stored file: size, modification time (ns), inode.
type FileStamp = (u64, i128, u64);

fn stamp_of(m: &fs::Metadata) -> FileStamp {
    use std::os::unix::fs::MetadataExt;
    (
        m.len(),
        i128::from(m.mtime()) * 1_000_000_000 + i128::from(m.mtime_nsec()),
        m.ino(),
    )
}

/// BLAKE3 of a file as lowercase hex, with its size: streamed for small files, over a
/// memory map on all cores from [`PARALLEL_HASH_FROM`] bytes.
pub fn hash_file(path: &Path) -> io::Result<(String, u64)> {
    let mut f = File::open(path)?;
    let len = f.metadata()?.len();
    if len >= PARALLEL_HASH_FROM {
        let mut h = blake3::Hasher::new();
        h.update_mmap_rayon(path)?;
        return Ok((h.finalize().to_hex().to_string(), len));
    }
    let mut h = blake3::Hasher::new();
    let mut buf = vec![0u8; 1 << 20];
    let mut size = 0u64;
    loop {
        let n = f.read(&mut buf)?;
        if n == 0 {
            break;
        }
        size += n as u64;
        h.update(&buf[..n]);
    }
    Ok((h.finalize().to_hex().to_string(), size))
}

impl ArtifactStore {
    /// Open (creating) the store under `root`.
    pub fn open(root: &Path) -> io::Result<Self> {
        fs::create_dir_all(root)?;
        Ok(ArtifactStore {
            root: root.to_path_buf(),
            verified: Default::default(),
        })
    }

    /// Where the artifact with this hash lives.
    pub fn path_of(&self, hash: &str) -> PathBuf {
        let (a, b) = hash.split_at(2.min(hash.len()));
        self.root.join(a).join(b)
    }

    /// Copy a file into the store; returns (hash, size). Existing content is not rewritten.
    pub fn put_file(&self, src: &Path) -> io::Result<(String, u64)> {
        // A copy follows a symbolic link (a start file may be one), never into a FIFO.
        regular_file(&fs::canonicalize(src)?)?;
        let (hash, size) = hash_file(src)?;
        let dest = self.path_of(&hash);
        if dest.is_file() {
            return Ok((hash, size));
        }
        let dir = dest.parent().unwrap_or(&self.root);
        fs::create_dir_all(dir)?;
        copy_durably(src, &dest, &hash, true)?;
        self.remember(&hash, &dest);
        Ok((hash, size))
    }

    /// Take a file into the store without copying it; returns (hash, size). On the same
    /// file system the stored file is a hard link to `src` (made read-only; fsynced before,
    /// the store folder after), so no data is written and `src` stays where it is until its
    /// scratch folder is recycled after the success is recorded (a crash in between leaves
    /// the outputs in place for the attempt to be adopted). Across file systems, or where
    /// links are refused, a copy that is fsynced. Content already stored is not rewritten.
    pub fn put_file_linked(&self, src: &Path) -> io::Result<(String, u64)> {
        regular_file(src)?;
        let (hash, size) = hash_file(src)?;
        crate::failpoint::hit(crate::failpoint::Failpoint::OutputHashed);
        let dest = self.path_of(&hash);
        if dest.is_file() {
            return Ok((hash, size));
        }
        let dir = dest.parent().unwrap_or(&self.root);
        fs::create_dir_all(dir)?;
        File::open(src)?.sync_all()?;
        read_only(src)?;
        match fs::hard_link(src, &dest) {
            Ok(()) => {}
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => {}
            Err(_) => copy_durably(src, &dest, &hash, true)?,
        }
        sync_dir(dir)?;
        self.remember(&hash, &dest);
        Ok((hash, size))
    }

    /// Put the stored artifact `hash` at `dest` (which must not exist). A shared input is a
    /// hard link to the read-only stored file, else a copy-on-write clone, else a copy. A
    /// `private` input is always the stage's own writable file: a clone or a copy. As root,
    /// read-only permissions do not stop a write, so a root process never gets a hard link:
    /// a stage that rewrote its input in place would change the stored content.
    ///
    /// The stored file is checked against its name first ([`ArtifactStore::verify`]), so a
    /// deleted, truncated or changed artifact is refused (`InvalidData`, naming the file)
    /// and never placed.
    pub fn place(&self, hash: &str, dest: &Path, private: bool) -> io::Result<Placement> {
        let src = self.path_of(hash);
        self.verify(hash)?;
        // SAFETY: geteuid has no preconditions and cannot fail.
        let root = unsafe { libc::geteuid() } == 0;
        if !private && !root {
            let m = fs::metadata(&src)?;
            if m.permissions().mode() & 0o222 != 0 {
                // Stored by an older rondo: make it read-only before sharing its inode.
                read_only(&src)?;
            }
            if fs::hard_link(&src, dest).is_ok() {
                return Ok(Placement::Linked);
            }
        }
        let placed = if clone_file(&src, dest).is_ok() {
            Placement::Cloned
        } else {
            let _ = fs::remove_file(dest);
            fs::copy(&src, dest)?;
            Placement::Copied
        };
        // The stored file's read bits (what the umask gave it), plus the owner's write bit
        // for a private copy: never more than the umask allowed.
        let stored = fs::metadata(&src)?.permissions().mode() & 0o555;
        let mode = if private { stored | 0o200 } else { stored };
        fs::set_permissions(dest, fs::Permissions::from_mode(mode))?;
        Ok(placed)
    }

    /// Check that the stored file of `hash` exists, is a regular file and hashes to its
    /// name. The full hash is computed on the first use in this process (a file this
    /// process stored counts as used: it was hashed as it was stored); later uses compare
    /// a `stat` (size, modification time in ns, inode) with the one seen then and hash again
    /// only when it differs. Caught: a deleted, replaced, truncated or rewritten file, and
    /// any change since the last check that moved its size or modification time. Not caught
    /// between two checks of one run: a rewrite of the same size that also restores the
    /// modification time (a deliberate forgery, not an accident).
    pub fn verify(&self, hash: &str) -> io::Result<()> {
        let src = self.path_of(hash);
        let damaged = |what: String| {
            io::Error::new(
                io::ErrorKind::InvalidData,
                format!(
                    "artifact {hash} in the store ({}) {what}; the workspace no longer holds \
                     the content its records name, and rondo will not use it: put the file \
                     back from a backup or a copy of the workspace (`rondo extract` of a copy), \
                     or run the campaign again in a new workspace (--workspace)",
                    src.display()
                ),
            )
        };
        let m = match fs::symlink_metadata(&src) {
            Ok(m) => m,
            Err(e) if e.kind() == io::ErrorKind::NotFound => {
                return Err(damaged("is missing (deleted?)".into()))
            }
            Err(e) => return Err(e),
        };
        if !m.is_file() {
            return Err(damaged("is not a regular file".into()));
        }
        let stamp = stamp_of(&m);
        let seen = || self.verified.lock().unwrap_or_else(|p| p.into_inner());
        if seen().get(hash) == Some(&stamp) {
            return Ok(());
        }
        let (got, size) = hash_file(&src)?;
        if got != hash {
            seen().remove(hash);
            return Err(damaged(format!(
                "has changed: its {size} bytes hash to {}",
                &got[..16]
            )));
        }
        seen().insert(hash.to_string(), stamp);
        Ok(())
    }

    /// Note a file this process just stored (and hashed) as verified, so that its first
    /// placement does not read it again.
    fn remember(&self, hash: &str, stored: &Path) {
        if let Ok(m) = fs::symlink_metadata(stored) {
            let mut seen = self.verified.lock().unwrap_or_else(|p| p.into_inner());
            seen.insert(hash.to_string(), stamp_of(&m));
        }
    }

    /// Store bytes; returns (hash, size).
    pub fn put_bytes(&self, bytes: &[u8]) -> io::Result<(String, u64)> {
        let hash = blake3::hash(bytes).to_hex().to_string();
        let dest = self.path_of(&hash);
        if !dest.is_file() {
            let dir = dest.parent().unwrap_or(&self.root);
            fs::create_dir_all(dir)?;
            let tmp = tmp_in(dir, &hash);
            let mut f = File::create(&tmp)?;
            f.write_all(bytes)?;
            f.sync_all()?;
            fs::rename(&tmp, &dest)?;
        }
        Ok((hash, bytes.len() as u64))
    }
}

/// Refuse, without opening it, anything at `path` that is not a regular file (a symbolic
/// link, a FIFO whose opening would block, a device, a socket, a folder).
fn regular_file(path: &Path) -> io::Result<()> {
    if fs::symlink_metadata(path)?.is_file() {
        return Ok(());
    }
    Err(io::Error::new(
        io::ErrorKind::InvalidInput,
        format!(
            "{} is not a regular file (a link, FIFO, device or folder): only regular files \
             enter the store",
            path.display()
        ),
    ))
}

/// Copy `src` to `dest` through a temporary name beside it (synced, made read-only when
/// asked, then renamed), so a crash leaves either no file or a complete one. The copy is
/// created under the process's umask (not with the source's mode: a start file may be
/// world-writable), and never gains a permission the umask takes away.
fn copy_durably(src: &Path, dest: &Path, hash: &str, ro: bool) -> io::Result<()> {
    let dir = dest.parent().unwrap_or(Path::new("."));
    let tmp = tmp_in(dir, hash);
    let _ = fs::remove_file(&tmp);
    {
        let mut from = File::open(src)?;
        let mut to = fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&tmp)?;
        io::copy(&mut from, &mut to)?;
        to.sync_all()?;
    }
    if ro {
        read_only(&tmp)?;
    }
    fs::rename(&tmp, dest)
}

/// A temporary name in the store folder `dir` for content `hash`, unique per call: two
/// threads storing the same content at once (two points' identical case files) must not
/// remove or overwrite each other's copy before it is renamed into place.
fn tmp_in(dir: &Path, hash: &str) -> PathBuf {
    static N: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    let n = N.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    dir.join(format!(".tmp-{}-{n}-{}", std::process::id(), &hash[..16]))
}

/// Take the write bits off a file, keeping its read bits (those its creation's umask left).
fn read_only(path: &Path) -> io::Result<()> {
    let mode = fs::metadata(path)?.permissions().mode() & 0o7555;
    fs::set_permissions(path, fs::Permissions::from_mode(mode))
}

/// fsync a folder, so that a rename into it is durable.
pub fn sync_dir(dir: &Path) -> io::Result<()> {
    File::open(dir)?.sync_all()
}

/// A copy-on-write clone of `src` at `dest` (Linux `FICLONE`: btrfs, xfs with reflink,
/// bcachefs, overlayfs over those). Fails where the file system cannot share extents, and
/// across file systems.
fn clone_file(src: &Path, dest: &Path) -> io::Result<()> {
    use std::os::fd::AsRawFd;
    let from = File::open(src)?;
    let to = fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(dest)?;
    // FICLONE = _IOW(0x94, 9, int) from linux/fs.h (a fact of the kernel ABI).
    const FICLONE: libc::c_ulong = 0x4004_9409;
    // SAFETY: both descriptors are open and owned for the duration of the call; the ioctl
    // takes the source descriptor as its integer argument and touches no memory of ours.
    let r = unsafe { libc::ioctl(to.as_raw_fd(), FICLONE as _, from.as_raw_fd()) };
    if r != 0 {
        let e = io::Error::last_os_error();
        drop(to);
        let _ = fs::remove_file(dest);
        return Err(e);
    }
    Ok(())
}

/// Write a small file atomically (temporary name, sync, rename).
pub fn write_new(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let dir = path.parent().unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".tmp-{}-{name}", std::process::id()));
    let mut f = File::create(&tmp)?;
    f.write_all(bytes)?;
    f.sync_all()?;
    fs::rename(&tmp, path)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dedup_and_known_hash() -> io::Result<()> {
        let d = tempfile::tempdir()?;
        let s = ArtifactStore::open(&d.path().join("store"))?;
        let (h1, n) = s.put_bytes(b"")?;
        // BLAKE3 of the empty input (test vector of the BLAKE3 specification).
        assert_eq!(
            h1,
            "af1349b9f5f9a1a6a0404dea36dcc9499bcb25c9adc112b7cc9a93cae41f3262"
        );
        assert_eq!(n, 0);
        let f = d.path().join("x");
        fs::write(&f, b"")?;
        let (h2, _) = s.put_file(&f)?;
        assert_eq!(h1, h2);
        assert!(s.path_of(&h1).is_file());
        Ok(())
    }

    #[test]
    fn outputs_enter_by_link_and_inputs_share_the_stored_inode() -> io::Result<()> {
        use std::os::unix::fs::MetadataExt;
        let d = tempfile::tempdir()?;
        let s = ArtifactStore::open(&d.path().join("store"))?;
        let out = d.path().join("restart.bin");
        let data: Vec<u8> = (0..200_000u32).flat_map(|i| i.to_le_bytes()).collect();
        fs::write(&out, &data)?;
        let ino = fs::metadata(&out)?.ino();
        let (h, n) = s.put_file_linked(&out)?;
        assert_eq!(h, blake3::hash(&data).to_hex().to_string());
        assert_eq!(n, data.len() as u64);
        let stored = fs::metadata(s.path_of(&h))?;
        assert_eq!(
            stored.ino(),
            ino,
            "same inode: linked into the store, not copied"
        );
        assert_eq!(stored.nlink(), 2);
        assert_eq!(stored.permissions().mode() & 0o777, 0o444);
        assert_eq!(
            fs::read(&out)?,
            data,
            "the output stays in place until recycled"
        );

        // Identical content again stores nothing new.
        let again = d.path().join("again.bin");
        fs::write(&again, &data)?;
        assert_eq!(s.put_file_linked(&again)?.0, h);
        assert_eq!(fs::metadata(&again)?.nlink(), 1);

        // A shared input: a hard link to the stored file unless we are root (then a clone
        // or a copy); a private one: the stage's own writable file, never the stored inode.
        let shared = d.path().join("in-shared.bin");
        let how = s.place(&h, &shared, false)?;
        // SAFETY: geteuid cannot fail.
        if unsafe { libc::geteuid() } == 0 {
            assert_ne!(how, Placement::Linked);
        } else {
            assert_eq!(how, Placement::Linked);
            assert_eq!(fs::metadata(&shared)?.ino(), ino);
        }
        assert_eq!(fs::metadata(&shared)?.permissions().mode() & 0o222, 0);
        let private = d.path().join("in-private.bin");
        assert_ne!(s.place(&h, &private, true)?, Placement::Linked);
        assert_ne!(fs::metadata(&private)?.ino(), ino);
        fs::write(&private, b"rewritten in place")?;
        assert_eq!(
            fs::read(s.path_of(&h))?,
            data,
            "the stored content is untouched"
        );
        assert_eq!(fs::read(&shared)?, data);
        Ok(())
    }

    #[test]
    fn large_files_hash_in_parallel_to_the_same_value() -> io::Result<()> {
        let d = tempfile::tempdir()?;
        let f = d.path().join("big");
        let mut rng = rondo_numerics::rng::SplitMix64::new(7);
        let data: Vec<u8> = (0..(PARALLEL_HASH_FROM as usize / 8 + 12_345))
            .flat_map(|_| rng.next_u64().to_le_bytes())
            .collect();
        fs::write(&f, &data)?;
        let (h, n) = hash_file(&f)?;
        assert_eq!(n, data.len() as u64);
        // The one-shot single-threaded hash of the same bytes.
        assert_eq!(h, blake3::hash(&data).to_hex().to_string());
        Ok(())
    }
}
