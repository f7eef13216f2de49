//! Folder artifacts: a folder is stored as a manifest — one entry per file, subfolder and
//! inner symlink, sorted by path, in one canonical JSON text — and the manifest is itself an
//! artifact, so its BLAKE3 names the folder. Every file is stored once by its content, so an
//! unchanged file of the next snapshot costs no store space.
//!
//! Owns the manifest format, walking a folder (or the matches of a glob) into the store, and
//! laying a stored folder out again. No SQL here: the engine records the members.
//!
//! What is refused, with the path and what to do: a symlink whose target is absolute or leaves
//! the folder, FIFOs, sockets and devices, and names that are not UTF-8. A symlink that stays
//! inside the folder is kept as a symlink (entry `link`), laid out again as the same link.

use std::fs;
use std::io;
use std::os::unix::fs::{FileTypeExt, PermissionsExt};
use std::path::{Component, Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::{ArtifactStore, Placement};

/// The `format` of every manifest this rondo writes.
pub const MANIFEST_FORMAT: &str = "rondo-folder/1";

/// A folder as stored: entries sorted by `path` (bytewise).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Manifest {
    /// Always [`MANIFEST_FORMAT`].
    pub format: String,
    /// Files, subfolders and inner symlinks, sorted by path.
    pub entries: Vec<Entry>,
}

/// One entry of a manifest.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Entry {
    /// Path relative to the folder, `/`-separated, no `.` or `..` parts.
    pub path: String,
    /// `file`, `dir` or `link`.
    pub kind: EntryKind,
    /// Files: `644`, or `755` when the owner may execute it (the only bit kept).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mode: Option<String>,
    /// Files: size in bytes.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub size: Option<u64>,
    /// Files: BLAKE3 of the content (the member's artifact).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub blake3: Option<String>,
    /// Links: the relative target, as written.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub target: Option<String>,
}

/// What an entry is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum EntryKind {
    /// A regular file.
    File,
    /// A (possibly empty) subfolder.
    Dir,
    /// A symlink that stays inside the folder.
    Link,
}

/// A stored folder: the manifest's hash and size, and its entries.
#[derive(Debug, Clone)]
pub struct StoredFolder {
    /// BLAKE3 of the manifest text: the folder's name.
    pub hash: String,
    /// Bytes of the manifest text.
    pub size: u64,
    /// The manifest.
    pub manifest: Manifest,
}

/// Why a folder could not be stored.
#[derive(Debug)]
pub enum FolderError {
    /// The folder holds something rondo does not store (the message says what and where).
    Refused(String),
    /// The file system failed.
    Io(io::Error),
}

impl std::fmt::Display for FolderError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            FolderError::Refused(m) => f.write_str(m),
            FolderError::Io(e) => write!(f, "{e}"),
        }
    }
}

impl std::error::Error for FolderError {}

impl From<io::Error> for FolderError {
    fn from(e: io::Error) -> Self {
        FolderError::Io(e)
    }
}

impl Manifest {
    /// The canonical text: compact JSON of the sorted entries, one trailing newline.
    pub fn to_text(&self) -> String {
        let mut s = serde_json::to_string(self).unwrap_or_default();
        s.push('\n');
        s
    }

    /// Parse a manifest text (`None` when it is not one).
    pub fn parse(bytes: &[u8]) -> Option<Manifest> {
        let m: Manifest = serde_json::from_slice(bytes).ok()?;
        (m.format == MANIFEST_FORMAT).then_some(m)
    }

    /// The file entries: (path, BLAKE3, size, mode).
    pub fn files(&self) -> impl Iterator<Item = (&str, &str, u64, &str)> {
        self.entries
            .iter()
            .filter_map(|e| match (&e.blake3, e.size, &e.mode) {
                (Some(h), Some(n), Some(m)) if e.kind == EntryKind::File => {
                    Some((e.path.as_str(), h.as_str(), n, m.as_str()))
                }
                _ => None,
            })
    }
}

/// Whether an output file name is a glob (`*` or `?`): its matches form a folder artifact.
pub fn is_glob(name: &str) -> bool {
    name.contains(['*', '?'])
}

/// `*` (any run of characters) and `?` (one character) against a whole file name.
pub fn glob_matches(pattern: &str, name: &str) -> bool {
    let p: Vec<char> = pattern.chars().collect();
    let n: Vec<char> = name.chars().collect();
    let (mut i, mut j) = (0usize, 0usize);
    let mut star: Option<(usize, usize)> = None;
    while j < n.len() {
        if i < p.len() && (p[i] == '?' || p[i] == n[j]) {
            i += 1;
            j += 1;
        } else if i < p.len() && p[i] == '*' {
            star = Some((i, j));
            i += 1;
        } else if let Some((si, sj)) = star {
            i = si + 1;
            j = sj + 1;
            star = Some((si, sj + 1));
        } else {
            return false;
        }
    }
    p[i..].iter().all(|c| *c == '*')
}

/// The name (manifest BLAKE3) the folder `dir` would have as a folder artifact, computed
/// without storing anything.
pub fn folder_hash(dir: &Path) -> Result<String, FolderError> {
    let mut entries = Vec::new();
    walk(dir, dir, &mut |p: &Path| super::hash_file(p), &mut entries)?;
    entries.sort_by(|a, b| a.path.as_bytes().cmp(b.path.as_bytes()));
    let m = Manifest {
        format: MANIFEST_FORMAT.into(),
        entries,
    };
    Ok(blake3::hash(m.to_text().as_bytes()).to_hex().to_string())
}

impl ArtifactStore {
    /// Store the folder `dir` (every file by content; `linked`: hard-linked in as outputs are,
    /// else copied) and its manifest. Refuses what a folder artifact cannot hold.
    pub fn put_folder(&self, dir: &Path, linked: bool) -> Result<StoredFolder, FolderError> {
        if !dir.is_dir() {
            return Err(FolderError::Refused(format!(
                "{}: no such folder",
                dir.display()
            )));
        }
        let mut entries = Vec::new();
        let mut put = |p: &Path| {
            if linked {
                self.put_file_linked(p)
            } else {
                self.put_file(p)
            }
        };
        walk(dir, dir, &mut put, &mut entries)?;
        self.put_manifest(entries)
    }

    /// Store the files of `dir` whose names match `pattern` (top level only) as one folder.
    pub fn put_glob(
        &self,
        dir: &Path,
        pattern: &str,
        linked: bool,
    ) -> Result<StoredFolder, FolderError> {
        let mut entries = Vec::new();
        for name in sorted_names(dir)? {
            if !glob_matches(pattern, &name) || name == "metrics.json" {
                continue;
            }
            let path = dir.join(&name);
            let meta = fs::symlink_metadata(&path)?;
            if !meta.file_type().is_file() {
                continue;
            }
            let mut put = |p: &Path| {
                if linked {
                    self.put_file_linked(p)
                } else {
                    self.put_file(p)
                }
            };
            entries.push(member(&path, name, &meta, &mut put)?);
        }
        if entries.is_empty() {
            return Err(FolderError::Refused(format!(
                "the output glob `{pattern}` matched no file in {}; check the pattern and that \
                 the program writes those files there",
                dir.display()
            )));
        }
        self.put_manifest(entries)
    }

    /// The manifest of a stored folder (`None` when `hash` is a plain file).
    pub fn manifest(&self, hash: &str) -> io::Result<Option<Manifest>> {
        let bytes = fs::read(self.path_of(hash))?;
        Ok(Manifest::parse(&bytes))
    }

    /// Lay the stored folder `hash` out at `dest` (created; must not exist). Shared: each
    /// file placed as [`ArtifactStore::place`] places inputs (read-only links where it can);
    /// `private`: each file the stage's own writable clone or copy, so a program may rewrite
    /// it in place. Returns how the files were placed (the weakest way used).
    pub fn place_folder(&self, hash: &str, dest: &Path, private: bool) -> io::Result<Placement> {
        let manifest = self.manifest(hash)?.ok_or_else(|| {
            io::Error::new(
                io::ErrorKind::InvalidData,
                format!("artifact {hash} is not a folder manifest"),
            )
        })?;
        fs::create_dir_all(dest)?;
        let mut how = Placement::Linked;
        for e in &manifest.entries {
            let at = dest.join(&e.path);
            match e.kind {
                EntryKind::Dir => fs::create_dir_all(&at)?,
                EntryKind::Link => {
                    let target = e.target.as_deref().unwrap_or_default();
                    std::os::unix::fs::symlink(target, &at)?;
                }
                EntryKind::File => {
                    if let Some(parent) = at.parent() {
                        fs::create_dir_all(parent)?;
                    }
                    let h = e.blake3.as_deref().unwrap_or_default();
                    let placed = self.place(h, &at, private)?;
                    let exec = e.mode.as_deref() == Some("755");
                    if private || placed != Placement::Linked {
                        let mode = match (private, exec) {
                            (true, true) => 0o755,
                            (true, false) => 0o644,
                            (false, true) => 0o555,
                            (false, false) => 0o444,
                        };
                        fs::set_permissions(&at, fs::Permissions::from_mode(mode))?;
                    }
                    how = weaker(how, placed);
                }
            }
        }
        Ok(how)
    }

    fn put_manifest(&self, mut entries: Vec<Entry>) -> Result<StoredFolder, FolderError> {
        entries.sort_by(|a, b| a.path.as_bytes().cmp(b.path.as_bytes()));
        let manifest = Manifest {
            format: MANIFEST_FORMAT.into(),
            entries,
        };
        let (hash, size) = self.put_bytes(manifest.to_text().as_bytes())?;
        crate::failpoint::hit(crate::failpoint::Failpoint::FolderSnapshot);
        Ok(StoredFolder {
            hash,
            size,
            manifest,
        })
    }
}

/// Stores (or only hashes) one file: (hash, size).
type PutFile<'a> = dyn FnMut(&Path) -> io::Result<(String, u64)> + 'a;

/// Every entry under `at` (a folder inside `root`), depth first, each file through `put`.
fn walk(
    root: &Path,
    at: &Path,
    put: &mut PutFile<'_>,
    out: &mut Vec<Entry>,
) -> Result<(), FolderError> {
    for name in sorted_names(at)? {
        let path = at.join(&name);
        let rel = relative(root, &path)?;
        let meta = fs::symlink_metadata(&path)?;
        let ft = meta.file_type();
        if ft.is_dir() {
            out.push(bare(rel, EntryKind::Dir));
            walk(root, &path, put, out)?;
        } else if ft.is_file() {
            out.push(member(&path, rel, &meta, put)?);
        } else if ft.is_symlink() {
            let target = fs::read_link(&path)?;
            check_link(root, &rel, &target)?;
            let mut e = bare(rel, EntryKind::Link);
            e.target = Some(target.to_string_lossy().into_owned());
            out.push(e);
        } else {
            let what = if ft.is_fifo() {
                "a FIFO"
            } else if ft.is_socket() {
                "a socket"
            } else {
                "a device"
            };
            return Err(FolderError::Refused(format!(
                "{}: {what} in the folder {}; a folder artifact holds only files, folders \
                 and symlinks that stay inside it: remove it before the stage ends",
                path.display(),
                root.display()
            )));
        }
    }
    Ok(())
}

/// The entry of one file, stored (or hashed) through `put`.
fn member(
    path: &Path,
    rel: String,
    meta: &fs::Metadata,
    put: &mut PutFile<'_>,
) -> Result<Entry, FolderError> {
    // The mode before storing (storing makes the file read-only).
    let exec = meta.permissions().mode() & 0o100 != 0;
    let (hash, size) = put(path)?;
    Ok(Entry {
        path: rel,
        kind: EntryKind::File,
        mode: Some(if exec { "755" } else { "644" }.into()),
        size: Some(size),
        blake3: Some(hash),
        target: None,
    })
}

fn bare(path: String, kind: EntryKind) -> Entry {
    Entry {
        path,
        kind,
        mode: None,
        size: None,
        blake3: None,
        target: None,
    }
}

fn weaker(a: Placement, b: Placement) -> Placement {
    use Placement::*;
    match (a, b) {
        (Copied, _) | (_, Copied) => Copied,
        (Cloned, _) | (_, Cloned) => Cloned,
        _ => Linked,
    }
}

/// The names in a folder, UTF-8 only, sorted bytewise.
fn sorted_names(dir: &Path) -> Result<Vec<String>, FolderError> {
    let mut names = Vec::new();
    for e in fs::read_dir(dir)? {
        let e = e?;
        let name = e.file_name().into_string().map_err(|n| {
            FolderError::Refused(format!(
                "{}: the name {:?} is not UTF-8; rename it",
                dir.display(),
                n
            ))
        })?;
        names.push(name);
    }
    names.sort();
    Ok(names)
}

fn relative(root: &Path, path: &Path) -> Result<String, FolderError> {
    let rel = path.strip_prefix(root).map_err(|_| {
        FolderError::Refused(format!("{} is outside {}", path.display(), root.display()))
    })?;
    Ok(rel
        .components()
        .map(|c| c.as_os_str().to_string_lossy().into_owned())
        .collect::<Vec<_>>()
        .join("/"))
}

/// A symlink at `rel` (inside the folder) may only point inside it, by a relative path.
fn check_link(root: &Path, rel: &str, target: &Path) -> Result<(), FolderError> {
    let refuse = |why: &str| {
        FolderError::Refused(format!(
            "{}: the symlink `{rel}` points {why} (to {}); a folder artifact holds only what is \
             inside the folder: copy the file in, or make the link relative and inside",
            root.display(),
            target.display()
        ))
    };
    if target.is_absolute() {
        return Err(refuse("to an absolute path, outside the folder"));
    }
    let mut depth: Vec<PathBuf> = Path::new(rel)
        .parent()
        .map(|p| {
            p.components()
                .map(|c| PathBuf::from(c.as_os_str()))
                .collect()
        })
        .unwrap_or_default();
    for c in target.components() {
        match c {
            Component::ParentDir => {
                if depth.pop().is_none() {
                    return Err(refuse("outside the folder"));
                }
            }
            Component::Normal(n) => depth.push(PathBuf::from(n)),
            Component::CurDir => {}
            Component::RootDir | Component::Prefix(_) => return Err(refuse("outside the folder")),
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn store(d: &Path) -> ArtifactStore {
        ArtifactStore::open(&d.join("store")).unwrap_or_else(|e| panic!("{e}"))
    }

    #[test]
    fn globs_match_whole_names() {
        assert!(glob_matches("*.dat", "a.dat"));
        assert!(glob_matches("*.dat", ".dat"));
        assert!(!glob_matches("*.dat", "a.dat.bak"));
        assert!(glob_matches("f?.t*t", "f1.txt"));
        assert!(glob_matches("*a*b*", "xxaYYbzz"));
        assert!(!glob_matches("?", ""));
    }

    #[test]
    fn a_folder_round_trips_and_unchanged_files_are_stored_once() -> Result<(), FolderError> {
        let d = tempfile::tempdir()?;
        let s = store(d.path());
        let case = d.path().join("case");
        fs::create_dir_all(case.join("sub/empty"))?;
        fs::write(case.join("b.txt"), "bee")?;
        fs::write(case.join("sub/a.bin"), [0u8, 1, 2])?;
        fs::set_permissions(case.join("sub/a.bin"), fs::Permissions::from_mode(0o755))?;
        std::os::unix::fs::symlink("../b.txt", case.join("sub/to-b"))?;
        let first = s.put_folder(&case, false)?;
        let paths: Vec<&str> = first
            .manifest
            .entries
            .iter()
            .map(|e| e.path.as_str())
            .collect();
        assert_eq!(
            paths,
            ["b.txt", "sub", "sub/a.bin", "sub/empty", "sub/to-b"]
        );
        assert_eq!(first.manifest.entries[2].mode.as_deref(), Some("755"));
        // The same content is the same folder; the text is canonical.
        assert_eq!(s.put_folder(&case, false)?.hash, first.hash);
        let text = fs::read_to_string(s.path_of(&first.hash))?;
        assert!(text.starts_with("{\"format\":\"rondo-folder/1\",\"entries\":[{\"path\":\"b.txt\""));

        let out = d.path().join("out");
        s.place_folder(&first.hash, &out, true)?;
        assert_eq!(fs::read_to_string(out.join("sub/to-b"))?, "bee");
        assert!(out.join("sub/empty").is_dir());
        fs::write(out.join("b.txt"), "rewritten")?;
        assert_eq!(
            fs::read_to_string(
                s.path_of(&first.manifest.entries[0].blake3.clone().unwrap_or_default())
            )?,
            "bee"
        );
        assert_eq!(
            s.put_folder(&out, false)?.manifest.entries[2],
            first.manifest.entries[2]
        );
        assert_eq!(
            s.manifest(&first.manifest.entries[0].blake3.clone().unwrap_or_default())?,
            None
        );
        Ok(())
    }

    #[test]
    fn links_out_of_the_folder_and_fifos_are_refused() -> Result<(), FolderError> {
        let d = tempfile::tempdir()?;
        let s = store(d.path());
        let case = d.path().join("case");
        fs::create_dir_all(case.join("sub"))?;
        std::os::unix::fs::symlink("../../secret", case.join("sub/out"))?;
        let e = s
            .put_folder(&case, false)
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert!(
            e.contains("symlink `sub/out` points outside the folder"),
            "{e}"
        );
        fs::remove_file(case.join("sub/out"))?;
        std::os::unix::fs::symlink("/etc/hostname", case.join("abs"))?;
        let e = s
            .put_folder(&case, false)
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert!(e.contains("to an absolute path"), "{e}");
        fs::remove_file(case.join("abs"))?;
        let fifo = std::ffi::CString::new(case.join("pipe").as_os_str().as_encoded_bytes())
            .map_err(|e| io::Error::new(io::ErrorKind::InvalidInput, e))?;
        // SAFETY: a valid NUL-terminated path; mkfifo touches no memory of ours.
        assert_eq!(unsafe { libc::mkfifo(fifo.as_ptr(), 0o644) }, 0);
        let e = s
            .put_folder(&case, false)
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert!(e.contains("a FIFO in the folder"), "{e}");
        let e = s
            .put_glob(&case, "*.dat", false)
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert!(e.contains("`*.dat` matched no file in"), "{e}");
        Ok(())
    }
}
