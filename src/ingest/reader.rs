//! Byte-stream adapters between a batch file and the decoder.
//!
//! [`Hashing`] computes the SHA-256 of exactly the bytes the decoder reads, in the same pass, so
//! a file's identity always matches its decoded content even if the file changes while it is
//! read. [`CappedLines`] bounds memory on hostile input: a physical line longer than the cap is
//! skipped (its bytes are read and dropped, never buffered) and its line number recorded, so a
//! 1 GiB line costs one rejected row and O(cap) memory. CSV fields with embedded newlines are
//! still supported; the cap applies to each physical line.

use std::io::{self, BufRead, Read};

use sha2::{Digest, Sha256};

/// Hashes everything read through it.
pub struct Hashing<R> {
    inner: R,
    hasher: Sha256,
}

impl<R: Read> Hashing<R> {
    pub fn new(inner: R) -> Self {
        Hashing { inner, hasher: Sha256::new() }
    }
    /// Reads whatever the decoder left unread (so the hash covers the whole file), then
    /// returns the hex digest.
    pub fn finish(mut self) -> io::Result<String> {
        io::copy(&mut self, &mut io::sink())?;
        Ok(self.hasher.finalize().iter().map(|b| format!("{b:02x}")).collect())
    }
}

impl<R: Read> Read for Hashing<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.hasher.update(&buf[..n]);
        Ok(n)
    }
}

/// Passes lines through unchanged, except that a line longer than `cap` bytes is replaced by an
/// empty line (which the decoders skip) and its 1-based number recorded in `too_long`.
pub struct CappedLines<R> {
    inner: R,
    cap: usize,
    line: u64,
    pending: Vec<u8>,
    pos: usize,
    /// Line numbers of the lines that were dropped for length.
    pub too_long: Vec<u64>,
}

impl<R: BufRead> CappedLines<R> {
    pub fn new(inner: R, cap: u64) -> Self {
        CappedLines {
            inner,
            cap: cap.min(usize::MAX as u64) as usize,
            line: 0,
            pending: Vec::new(),
            pos: 0,
            too_long: Vec::new(),
        }
    }
    /// The wrapped reader.
    pub fn into_inner(self) -> R {
        self.inner
    }

    /// Loads the next physical line into `pending`, or leaves it empty at the end of input.
    fn next_line(&mut self) -> io::Result<()> {
        self.pending.clear();
        self.pos = 0;
        let mut over = false;
        loop {
            let buf = self.inner.fill_buf()?;
            if buf.is_empty() {
                break;
            }
            let (chunk, done) = match buf.iter().position(|&b| b == b'\n') {
                Some(i) => (&buf[..=i], true),
                None => (buf, false),
            };
            let used = chunk.len();
            if !over {
                if self.pending.len() + used > self.cap.saturating_add(2) {
                    over = true; // keep reading to the newline, but buffer nothing more
                    self.pending.clear();
                } else {
                    self.pending.extend_from_slice(chunk);
                }
            }
            self.inner.consume(used);
            if done {
                break;
            }
        }
        if over || !self.pending.is_empty() {
            self.line += 1;
        }
        if over {
            self.too_long.push(self.line);
            self.pending.clear();
            self.pending.push(b'\n');
        }
        Ok(())
    }
}

impl<R: BufRead> Read for CappedLines<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        if self.pos >= self.pending.len() {
            self.next_line()?;
            if self.pending.is_empty() {
                return Ok(0);
            }
        }
        let n = buf.len().min(self.pending.len() - self.pos);
        buf[..n].copy_from_slice(&self.pending[self.pos..self.pos + n]);
        self.pos += n;
        Ok(n)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn long_lines_become_blank_and_are_recorded() {
        let body = format!("a,b\n1,2\n{}\n3,4\n{}", "x".repeat(100), "y".repeat(50));
        let mut r = CappedLines::new(body.as_bytes(), 20);
        let mut out = String::new();
        r.read_to_string(&mut out).unwrap();
        assert_eq!(out, "a,b\n1,2\n\n3,4\n\n");
        assert_eq!(r.too_long, [3, 5]);
    }

    #[test]
    fn hash_covers_the_whole_input_even_if_unread() {
        // SHA-256("abc") from FIPS 180-2, appendix B.1.
        let mut h = Hashing::new(&b"abc"[..]);
        let mut one = [0u8; 1];
        h.read_exact(&mut one).unwrap();
        assert_eq!(h.finish().unwrap(), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }
}
