//! The content-addressed artifact store: files named by their BLAKE3 hash under
//! `<workspace>/store/<2 hex>/<rest>`, written to a temporary name, synced and renamed, so a
//! crash leaves either no file or a complete one; identical content is stored once.

use std::fs::{self, File};
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};

/// The store folder of one workspace.
#[derive(Debug, Clone)]
pub struct ArtifactStore {
    root: PathBuf,
}

/// BLAKE3 of a file, streamed, as lowercase hex.
pub fn hash_file(path: &Path) -> io::Result<(String, u64)> {
    let mut f = File::open(path)?;
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
        })
    }

    /// Where the artifact with this hash lives.
    pub fn path_of(&self, hash: &str) -> PathBuf {
        let (a, b) = hash.split_at(2.min(hash.len()));
        self.root.join(a).join(b)
    }

    /// Copy a file into the store; returns (hash, size). Existing content is not rewritten.
    pub fn put_file(&self, src: &Path) -> io::Result<(String, u64)> {
        let (hash, size) = hash_file(src)?;
        let dest = self.path_of(&hash);
        if dest.is_file() {
            return Ok((hash, size));
        }
        let dir = dest.parent().unwrap_or(&self.root);
        fs::create_dir_all(dir)?;
        let tmp = dir.join(format!(".tmp-{}-{}", std::process::id(), &hash[..16]));
        fs::copy(src, &tmp)?;
        File::open(&tmp)?.sync_all()?;
        fs::rename(&tmp, &dest)?;
        Ok((hash, size))
    }

    /// Store bytes; returns (hash, size).
    pub fn put_bytes(&self, bytes: &[u8]) -> io::Result<(String, u64)> {
        let hash = blake3::hash(bytes).to_hex().to_string();
        let dest = self.path_of(&hash);
        if !dest.is_file() {
            let dir = dest.parent().unwrap_or(&self.root);
            fs::create_dir_all(dir)?;
            let tmp = dir.join(format!(".tmp-{}-{}", std::process::id(), &hash[..16]));
            let mut f = File::create(&tmp)?;
            f.write_all(bytes)?;
            f.sync_all()?;
            fs::rename(&tmp, &dest)?;
        }
        Ok((hash, bytes.len() as u64))
    }
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
}
