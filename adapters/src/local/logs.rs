//! The kept logs of a local attempt: its stdout and stderr come through pipes and are
//! written to `stdout.txt` / `stderr.txt` in its scratch folder, keeping the first and the
//! last [`DEFAULT_LOG_KEEP`] bytes of each (`RONDO_LOG_KEEP_MIB` changes it), with one line
//! between them saying how many bytes were left out. A stage that floods its output
//! therefore costs at most twice that on disk per stream, and the tail held in memory until
//! the stream ends is at most that. The tail is written when the stream ends: if rondo dies
//! before, the kept log has only its head.
//!
//! Owns only the copying from a pipe to a file; knows nothing of attempts or processes.

use std::collections::VecDeque;
use std::fs::File;

use tokio::io::{AsyncRead, AsyncReadExt, AsyncWriteExt};
use tokio::sync::oneshot;

/// Bytes kept of each log's start, and as many of its end: 8 MiB.
pub const DEFAULT_LOG_KEEP: usize = 8 << 20;

/// The bytes kept of each end of a log: `RONDO_LOG_KEEP_MIB` (a whole number of MiB, at
/// least 1) when set and valid, else [`DEFAULT_LOG_KEEP`].
pub fn log_keep() -> usize {
    std::env::var("RONDO_LOG_KEEP_MIB")
        .ok()
        .and_then(|v| v.trim().parse::<usize>().ok())
        .filter(|m| (1..=4096).contains(m))
        .map_or(DEFAULT_LOG_KEEP, |m| m << 20)
}

/// Copy `pipe` into `file` until the pipe ends (every writer closed it) or `stop` fires
/// (or its sender is dropped), keeping the first and last `keep` bytes. Returns the number
/// of bytes the stream carried.
pub async fn keep_log(
    mut pipe: impl AsyncRead + Unpin,
    file: File,
    keep: usize,
    mut stop: oneshot::Receiver<()>,
) -> std::io::Result<u64> {
    let mut out = tokio::fs::File::from_std(file);
    let mut buf = vec![0u8; 64 << 10];
    let mut total = 0u64;
    let mut head = 0usize;
    let mut tail: VecDeque<u8> = VecDeque::new();
    loop {
        let n = tokio::select! {
            r = pipe.read(&mut buf) => r?,
            _ = &mut stop => break,
        };
        if n == 0 {
            break;
        }
        total += n as u64;
        let mut chunk = &buf[..n];
        if head < keep {
            let k = (keep - head).min(chunk.len());
            out.write_all(&chunk[..k]).await?;
            head += k;
            chunk = &chunk[k..];
        }
        if !chunk.is_empty() {
            tail.extend(chunk);
            if tail.len() > keep {
                let extra = tail.len() - keep;
                tail.drain(..extra);
            }
        }
    }
    let left_out = total - head as u64 - tail.len() as u64;
    if left_out > 0 {
        let line = format!(
            "\n[rondo: {left_out} bytes of this log were left out; it keeps the first and the \
             last {} MiB]\n",
            keep >> 20
        );
        out.write_all(line.as_bytes()).await?;
    }
    let (a, b) = tail.as_slices();
    out.write_all(a).await?;
    out.write_all(b).await?;
    out.flush().await?;
    Ok(total)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn short_logs_are_whole_and_long_ones_keep_both_ends() -> std::io::Result<()> {
        let d = tempfile::tempdir()?;
        for (len, keep) in [(10usize, 4usize), (8, 4), (3, 4), (0, 4)] {
            let data: Vec<u8> = (0..len).map(|i| b'a' + (i % 26) as u8).collect();
            let p = d.path().join(format!("log{len}"));
            let (_tx, rx) = oneshot::channel();
            let n = keep_log(&data[..], File::create(&p)?, keep, rx).await?;
            assert_eq!(n, len as u64);
            let got = std::fs::read(&p)?;
            if len <= 2 * keep {
                assert_eq!(got, data);
            } else {
                let text = String::from_utf8_lossy(&got).into_owned();
                assert!(text.starts_with("abcd\n[rondo: 2 bytes of this log were left out"));
                assert!(text.ends_with("]\nghij"), "{text}");
            }
        }
        Ok(())
    }
}
