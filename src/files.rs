//! Files from outside and files we write.
//!
//! Reading: only regular files are read. A FIFO would block the reader forever and a
//! device such as `/dev/zero` never ends, so the type is checked before the file is
//! opened, and again on the opened handle (opened non-blocking, so even a FIFO swapped
//! in between cannot block); the size is checked against what the reader can need
//! before anything is read.
//!
//! Writing: through a temporary file in the target's directory and a rename, so a
//! reader never sees half a file and a failed write leaves nothing behind; paths are
//! checked before a run starts ([`check_output_file`], [`check_output_dir`]) so a bad
//! one costs nothing.

use std::fs::{File, Metadata};
use std::io::{Read, Write};
use std::path::Path;

use crate::error::{Error, Result};

/// What a non-regular file is, in words.
fn kind_of(meta: &Metadata) -> &'static str {
    let t = meta.file_type();
    if t.is_dir() {
        return "a directory";
    }
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt as _;
        if t.is_fifo() {
            return "a FIFO (named pipe)";
        }
        if t.is_char_device() {
            return "a character device";
        }
        if t.is_block_device() {
            return "a block device";
        }
        if t.is_socket() {
            return "a socket";
        }
    }
    "not a regular file"
}

fn refuse(path: &Path, meta: &Metadata) -> Error {
    Error::format(
        path.display(),
        format!(
            "is {}, not a regular file; refusing to read it",
            kind_of(meta)
        ),
    )
}

/// The size of `path` if it is a regular file (symbolic links followed); an error
/// naming its type otherwise. Nothing is opened.
pub fn regular_len(path: &Path) -> Result<u64> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io("read", path, e))?;
    if !meta.is_file() {
        return Err(refuse(path, &meta));
    }
    Ok(meta.len())
}

/// Opens a regular file for reading; anything else is refused by type, before the
/// open and again on the handle.
pub fn open_regular(path: &Path) -> Result<(File, u64)> {
    regular_len(path)?;
    let mut options = std::fs::OpenOptions::new();
    options.read(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt as _;
        // Non-blocking open: a FIFO put in place after the check above cannot block.
        options.custom_flags(libc::O_NONBLOCK);
    }
    let file = options.open(path).map_err(|e| Error::io("read", path, e))?;
    let meta = file.metadata().map_err(|e| Error::io("read", path, e))?;
    if !meta.is_file() {
        return Err(refuse(path, &meta));
    }
    Ok((file, meta.len()))
}

/// Reads a regular file of at most `limit` bytes; `what` says what the file is for in
/// the error ("a vector file", "the result file of case x").
pub fn read_regular(path: &Path, limit: u64, what: &str) -> Result<Vec<u8>> {
    let (file, len) = open_regular(path)?;
    if len > limit {
        return Err(Error::format(
            path.display(),
            format!(
                "is {len} bytes, more than {what} can need ({limit} bytes); refusing to read it"
            ),
        ));
    }
    let mut bytes = Vec::with_capacity(usize::try_from(len).unwrap_or(0));
    file.take(limit.saturating_add(1))
        .read_to_end(&mut bytes)
        .map_err(|e| Error::io("read", path, e))?;
    if bytes.len() as u64 > limit {
        return Err(Error::format(
            path.display(),
            format!("grew past {limit} bytes while it was read"),
        ));
    }
    Ok(bytes)
}

/// Reads exactly `len` bytes from `file` at its current position.
pub fn read_exact_len(file: &mut File, len: usize, path: &Path) -> Result<Vec<u8>> {
    let mut bytes = Vec::new();
    bytes
        .try_reserve_exact(len)
        .map_err(|e| Error::format(path.display(), format!("cannot hold {len} bytes: {e}")))?;
    file.take(len as u64)
        .read_to_end(&mut bytes)
        .map_err(|e| Error::io("read", path, e))?;
    Ok(bytes)
}

/// Opens `path` for appending, creating it if needed (a kernel log).
pub fn open_append(path: &Path) -> Result<File> {
    open_for_writing(path, true)
}

/// Creates (or truncates) `path` for writing as it goes (a protocol trace).
pub fn create_streamed(path: &Path) -> Result<File> {
    open_for_writing(path, false)
}

fn open_for_writing(path: &Path, append: bool) -> Result<File> {
    let mut options = std::fs::OpenOptions::new();
    options.create(true);
    if append {
        options.append(true);
    } else {
        options.write(true).truncate(true);
    }
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt as _;
        // A FIFO without a reader must fail, not block the run.
        options.custom_flags(libc::O_NONBLOCK);
    }
    let file = options
        .open(path)
        .map_err(|e| Error::io("write", path, e))?;
    #[cfg(unix)]
    {
        use std::os::unix::io::AsRawFd as _;
        // Writes block again as usual (O_NONBLOCK was for the open only).
        // SAFETY: fcntl on a descriptor we own; no memory is passed.
        unsafe {
            let fd = file.as_raw_fd();
            let flags = libc::fcntl(fd, libc::F_GETFL);
            if flags >= 0 {
                libc::fcntl(fd, libc::F_SETFL, flags & !libc::O_NONBLOCK);
            }
        }
    }
    Ok(file)
}

/// The directory a file path lives in (`.` for a bare name).
fn parent_of(path: &Path) -> &Path {
    path.parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."))
}

/// Checks, before a run, that a directory exists or could be created and that a file
/// can be created in it. Nothing is left behind: the nearest existing ancestor is
/// probed with a temporary file.
pub fn check_output_dir(dir: &Path) -> Result<()> {
    let mut probe = dir;
    loop {
        match std::fs::metadata(probe) {
            Ok(meta) if meta.is_dir() => break,
            Ok(_) => {
                return Err(Error::format(
                    probe.display(),
                    format!("is not a directory, so {} cannot be created", dir.display()),
                ))
            }
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                probe = match probe.parent() {
                    Some(p) if !p.as_os_str().is_empty() => p,
                    _ => Path::new("."),
                };
            }
            Err(e) => return Err(Error::io("write", probe, e)),
        }
    }
    tempfile::Builder::new()
        .prefix(".posconform-probe")
        .tempfile_in(probe)
        .map(drop)
        .map_err(|e| Error::io("write", dir, e))
}

/// Checks, before a run, that `path` can be written as a report or log file: it is not
/// a directory and its directory accepts new files.
pub fn check_output_file(path: &Path) -> Result<()> {
    if let Ok(meta) = std::fs::metadata(path) {
        if meta.is_dir() {
            return Err(Error::format(
                path.display(),
                "is a directory; give a file name",
            ));
        }
    }
    if path.file_name().is_none() {
        return Err(Error::format(path.display(), "has no file name"));
    }
    check_output_dir(parent_of(path))
}

/// Writes `contents` to `path` through a temporary file in the same directory and a
/// rename, so a reader never sees a half-written file; on any failure the temporary
/// file is removed. The directory is created if needed.
pub fn write_atomic(path: &Path, contents: &[u8]) -> Result<()> {
    let dir = parent_of(path);
    std::fs::create_dir_all(dir).map_err(|e| Error::io("create", dir, e))?;
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .ok_or_else(|| Error::format(path.display(), "has no file name"))?;
    let mut temp = tempfile::Builder::new()
        .prefix(&format!(".{name}."))
        .suffix(".tmp")
        .tempfile_in(dir)
        .map_err(|e| Error::io("create", dir, e))?;
    // On an error below, `temp` is dropped and its file deleted.
    temp.write_all(contents)
        .and_then(|_| temp.flush())
        .map_err(|e| Error::io("write", path, e))?;
    temp.persist(path)
        .map(drop)
        .map_err(|e| Error::io("write", path, e.error))
}
