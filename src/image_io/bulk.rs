//! Large outputs written past the page cache.
//!
//! A map file is often 100 MB per image, written once and read later by
//! another job. Through the page cache every byte first lands in a freshly
//! allocated cache page (on virtual machines that hand free memory back to
//! their host, that allocation is the slowest part of writing: about
//! 300 MB/s measured on the project's 2-core test machine, against 1.4 GB/s
//! written directly) and is then written back in bursts that compete with the
//! next image. Writing with `O_DIRECT` sends whole aligned blocks straight to
//! the device from one reused buffer; the last partial block goes through
//! the page cache as usual. Where the file system refuses direct writes
//! (tmpfs, some network mounts) everything goes through the page cache.
//! No crate offers this for a plain `std::fs::File`, so it is written here.

use std::fs::File;
use std::io::{self, Write};

/// Alignment of direct writes: a multiple of every common logical block size.
const ALIGN: usize = 4096;
/// Bytes per direct write: large enough that the system call cost vanishes,
/// small enough to stay in the CPU's caches while being copied.
const CHUNK: usize = 4 << 20;

/// Writes `parts` one after the other to `file` (at its current position,
/// normally the start of a new file). Returns whether the bulk of it was
/// written directly.
pub fn write_parts(file: &File, parts: &[&[u8]]) -> io::Result<bool> {
    write_parts_in(file, parts, CHUNK)
}

/// [`write_parts`] with direct writes of `chunk` bytes (a multiple of
/// [`ALIGN`]).
fn write_parts_in(file: &File, parts: &[&[u8]], chunk: usize) -> io::Result<bool> {
    debug_assert!(chunk > 0 && chunk % ALIGN == 0);
    let total: usize = parts.iter().map(|p| p.len()).sum();
    if total < 2 * chunk || !direct::enable(file) {
        return buffered(file, parts).map(|()| false);
    }
    let mut store = vec![0u8; chunk + ALIGN];
    let off = store.as_ptr().align_offset(ALIGN);
    let buf = &mut store[off..off + chunk];
    let mut fill = 0;
    let mut out = file;
    let mut is_direct = true;
    for part in parts {
        let mut rest = *part;
        while !rest.is_empty() {
            let n = rest.len().min(chunk - fill);
            buf[fill..fill + n].copy_from_slice(&rest[..n]);
            fill += n;
            rest = &rest[n..];
            if fill == chunk {
                if is_direct {
                    match out.write_all(buf) {
                        Ok(()) => {}
                        // Accepted at open but refused on write: page cache
                        // from here on (a failed direct write writes nothing).
                        Err(e) if e.raw_os_error() == Some(direct::EINVAL) => {
                            is_direct = false;
                            direct::disable(file)?;
                            out.write_all(buf)?;
                        }
                        Err(e) => return Err(e),
                    }
                } else {
                    out.write_all(buf)?;
                }
                fill = 0;
            }
        }
    }
    if is_direct {
        direct::disable(file)?;
    }
    out.write_all(&buf[..fill])?;
    Ok(is_direct)
}

fn buffered(file: &File, parts: &[&[u8]]) -> io::Result<()> {
    let mut w = io::BufWriter::with_capacity(1 << 20, file);
    for p in parts {
        w.write_all(p)?;
    }
    w.flush()
}

#[cfg(target_os = "linux")]
mod direct {
    use std::fs::File;
    use std::io;
    use std::os::fd::AsRawFd;

    pub const EINVAL: i32 = libc::EINVAL;

    /// Turns direct writes on; false where the file system refuses them.
    pub fn enable(file: &File) -> bool {
        let fd = file.as_raw_fd();
        // SAFETY: fcntl on a descriptor this process owns, with integer flags.
        unsafe {
            let flags = libc::fcntl(fd, libc::F_GETFL);
            flags >= 0 && libc::fcntl(fd, libc::F_SETFL, flags | libc::O_DIRECT) == 0
        }
    }

    pub fn disable(file: &File) -> io::Result<()> {
        let fd = file.as_raw_fd();
        // SAFETY: as in `enable`.
        let ok = unsafe {
            let flags = libc::fcntl(fd, libc::F_GETFL);
            flags >= 0 && libc::fcntl(fd, libc::F_SETFL, flags & !libc::O_DIRECT) == 0
        };
        if ok {
            Ok(())
        } else {
            Err(io::Error::last_os_error())
        }
    }
}

#[cfg(not(target_os = "linux"))]
mod direct {
    use std::fs::File;
    use std::io;

    pub const EINVAL: i32 = -1;

    pub fn enable(_: &File) -> bool {
        false
    }

    pub fn disable(_: &File) -> io::Result<()> {
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Read;

    fn pattern(n: usize, seed: u32) -> Vec<u8> {
        let mut x = seed;
        (0..n)
            .map(|_| {
                // A small linear congruential sequence (common practice, no source).
                x = x.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
                (x >> 24) as u8
            })
            .collect()
    }

    fn written(dir: &std::path::Path, parts: &[&[u8]], chunk: usize) -> (Vec<u8>, bool) {
        let path = dir.join("out.bin");
        let f = File::create(&path).unwrap();
        let direct = write_parts_in(&f, parts, chunk).unwrap();
        drop(f);
        let mut back = Vec::new();
        File::open(&path).unwrap().read_to_end(&mut back).unwrap();
        (back, direct)
    }

    #[test]
    fn every_byte_lands_in_order_across_chunk_edges() {
        // In the source tree, on the disk the project is built on (a tmpfs
        // temporary folder would refuse direct writes and test only the
        // buffered path, below).
        let d = tempfile::tempdir_in(env!("CARGO_MANIFEST_DIR")).unwrap();
        let head = pattern(128, 1);
        for body_len in [
            3 * ALIGN * 4,
            3 * ALIGN * 4 + 1,
            5 * ALIGN * 4 - 128,
            41_234,
        ] {
            let body = pattern(body_len, body_len as u32);
            let (back, _) = written(d.path(), &[&head, &body], ALIGN * 4);
            assert_eq!(back.len(), head.len() + body.len(), "{body_len}");
            assert_eq!(&back[..128], &head[..]);
            assert!(back[128..] == body[..], "{body_len}: bytes differ");
        }
    }

    #[test]
    fn small_outputs_and_refusing_file_systems_go_through_the_page_cache() {
        let d = tempfile::tempdir().unwrap();
        let body = pattern(10_000, 7);
        let (back, direct) = written(d.path(), &[b"head", &body], ALIGN * 4);
        assert!(!direct, "below two chunks nothing is written directly");
        assert_eq!(&back[..4], b"head");
        assert!(back[4..] == body[..]);
        // tmpfs refuses O_DIRECT (Linux open(2), EINVAL): the whole file
        // still arrives, through the page cache.
        let shm = std::path::Path::new("/dev/shm");
        if cfg!(target_os = "linux") && shm.is_dir() {
            let d = tempfile::tempdir_in(shm).unwrap();
            let body = pattern(9 * ALIGN * 4 + 3, 9);
            let (back, _) = written(d.path(), &[&body], ALIGN * 4);
            assert!(back == body);
        }
    }
}
