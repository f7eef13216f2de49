//! The restart file `<name>.restart`: a binary file of a chosen size holding what the next
//! iteration depends on (the density and Σ(iω_n)), padded to the size with bytes drawn from a
//! generator seeded by that state, so that equal states give byte-identical files. It is
//! rewritten in place (same file, no truncation first) by `init` and `update`.
//!
//! Layout (little endian): 8 bytes magic `CBRSTRT1`, u64 iteration, u64 total size in
//! bytes, u64 count n of state values, n f64 state values, then padding to the total size.

use anyhow::{bail, Context, Result};
use rondo_numerics::rng::SplitMix64;
use std::io::{Seek, SeekFrom, Write};
use std::path::Path;

/// Magic bytes at the start of a restart file.
pub const MAGIC: &[u8; 8] = b"CBRSTRT1";

/// Largest size accepted by `--restart-mib`.
pub const MAX_MIB: u64 = 65_536;

/// Write the restart file of `mib` MiB (at least the header and the state) in place.
pub fn write(path: &Path, mib: u64, iteration: u64, state: &[f64]) -> Result<()> {
    if mib > MAX_MIB {
        bail!("--restart-mib: at most {MAX_MIB} MiB, got {mib}");
    }
    let head = 32 + 8 * state.len() as u64;
    let total = (mib << 20).max(head);
    let mut buf = Vec::with_capacity(head as usize);
    buf.extend_from_slice(MAGIC);
    for x in [iteration, total, state.len() as u64] {
        buf.extend_from_slice(&x.to_le_bytes());
    }
    for x in state {
        buf.extend_from_slice(&x.to_le_bytes());
    }
    // The seed is a hash of the state's bits (FNV-1a over the 64-bit words).
    let seed = state.iter().fold(0xcbf2_9ce4_8422_2325_u64, |h, x| {
        (h ^ x.to_bits()).wrapping_mul(0x0000_0100_0000_01b3)
    });
    let mut rng = SplitMix64::new(seed ^ iteration);
    let shown = path.display();
    let mut f = std::fs::OpenOptions::new()
        .create(true)
        .write(true)
        .truncate(false)
        .open(path)
        .with_context(|| format!("{shown}: cannot open the restart file"))?;
    f.seek(SeekFrom::Start(0))
        .and_then(|_| f.write_all(&buf))
        .with_context(|| format!("{shown}: cannot write the restart header"))?;
    let mut left = total - head;
    let mut chunk = vec![0u8; 1 << 16];
    while left > 0 {
        let n = left.min(chunk.len() as u64) as usize;
        for word in chunk[..n].chunks_mut(8) {
            let r = rng.next_u64().to_le_bytes();
            word.copy_from_slice(&r[..word.len()]);
        }
        f.write_all(&chunk[..n])
            .with_context(|| format!("{shown}: cannot write the restart padding"))?;
        left -= n as u64;
    }
    f.set_len(total)
        .and_then(|_| f.sync_all())
        .with_context(|| format!("{shown}: cannot finish the restart file"))
}

/// Read the iteration and the state values back (the padding is not checked).
pub fn read(path: &Path) -> Result<(u64, Vec<f64>)> {
    let bytes = std::fs::read(path)
        .with_context(|| format!("{}: cannot read the restart file", path.display()))?;
    let word = |i: usize| -> Option<u64> {
        bytes
            .get(8 + 8 * i..16 + 8 * i)
            .and_then(|b| b.try_into().ok())
            .map(u64::from_le_bytes)
    };
    if bytes.get(..8) != Some(MAGIC.as_slice()) {
        bail!(
            "{}: not a casebook restart file (bad magic)",
            path.display()
        );
    }
    let (Some(iteration), Some(total), Some(n)) = (word(0), word(1), word(2)) else {
        bail!("{}: restart header is truncated", path.display());
    };
    if total != bytes.len() as u64 {
        bail!(
            "{}: restart file has {} bytes, its header says {total}",
            path.display(),
            bytes.len()
        );
    }
    let state: Option<Vec<f64>> = (0..n as usize)
        .map(|i| word(3 + i).map(f64::from_bits))
        .collect();
    let state = state.with_context(|| format!("{}: restart state is truncated", path.display()))?;
    Ok((iteration, state))
}
