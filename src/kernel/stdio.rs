//! The stdio client: runs a team's kernel as a child process and speaks protocol v1
//! (docs/protocol.md) over its stdin and stdout.
//!
//! Nothing the kernel does can hang, exhaust or outlive the harness:
//!
//! - **Time.** Requests are written by a writer thread and replies read by a reader
//!   thread; the caller waits on both with one deadline, so a kernel that stops reading
//!   its stdin times out exactly like one that never answers.
//! - **Memory.** A reply line may be at most [`reply_limit`] bytes for its case (the
//!   excess is discarded while it is read, never stored); replies are parsed in one pass
//!   into typed arrays. Stderr is read as bytes, to the end, whatever it holds:
//!   invalid UTF-8 is replaced, a `\r` (a progress bar redrawing its line) starts the
//!   line over, and a line longer than [`MAX_STDERR_LINE`] keeps its beginning and a
//!   note of how much was dropped.
//! - **Processes.** On Unix the kernel starts in a process group of its own. Whenever a
//!   process is given up (timeout, crash, garbage, shutdown, or a signal to posconform
//!   through [`interrupt`]) the whole group gets SIGTERM, then SIGKILL after
//!   [`GRACE`]: children the kernel started go with it.
//!
//! Any failure to answer ends the process; [`Kernel::restart`] starts a new one and
//! repeats the handshake. A clean JSON-RPC error reply costs the case only.

use std::collections::VecDeque;
use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, ChildStdin, Command, ExitStatus, Stdio};
use std::sync::atomic::{AtomicBool, AtomicI32, AtomicUsize, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, Sender, SyncSender};
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use serde_json::{json, Value};

use crate::case::{Arrays, Case};
use crate::error::{Error, KernelErrorKind, Result};
use crate::kernel::protocol::{self, Reply, UNSUPPORTED};
use crate::kernel::{Answer, Kernel, KernelInfo};
use crate::math::precision::Dtype;

/// How many stderr lines are shown with an error.
const STDERR_TAIL: usize = 12;
/// Longest stderr line kept (bytes); the rest of a longer line is dropped with a note.
pub const MAX_STDERR_LINE: usize = 8 * 1024;
/// Longest reply line to a handshake (bytes).
pub const MAX_HANDSHAKE_LINE: usize = 1 << 20;
/// Time a process group gets between SIGTERM and SIGKILL.
pub const GRACE: Duration = Duration::from_secs(2);
/// Events (stdout lines among them) queued from one process before its threads wait.
const EVENT_QUEUE: usize = 8;
/// Time allowed, after a process ended, for its last stdout and stderr bytes to
/// arrive (they are already in the pipes; this only bounds a descendant that escaped
/// the process group and still holds them).
const DRAIN: Duration = Duration::from_millis(1000);

/// The longest reply line accepted for `case`: 1 MiB plus 48 bytes per expected output
/// element, room for any encoding (base64 of f64 is under 11 bytes an element, a JSON
/// number with every digit about 25).
pub fn reply_limit(case: &Case) -> usize {
    let elements = case
        .output_shapes()
        .iter()
        .map(|(_, shape)| {
            shape
                .iter()
                .try_fold(1usize, |a, &d| a.checked_mul(d))
                .unwrap_or(usize::MAX)
        })
        .fold(0usize, usize::saturating_add);
    elements.saturating_mul(48).saturating_add(1 << 20)
}

// ---------------------------------------------------------------------------------
// Signals: the kernels alive right now, so a signal to posconform reaches them.

/// Process groups of the kernels currently running (Unix: the leader's pid).
static GROUPS: Mutex<Vec<u32>> = Mutex::new(Vec::new());
/// The signal posconform received (0: none).
static INTERRUPTED: AtomicI32 = AtomicI32::new(0);

/// The signal number [`interrupt`] was called with, if it was.
pub fn interrupted() -> Option<i32> {
    match INTERRUPTED.load(Ordering::SeqCst) {
        0 => None,
        s => Some(s),
    }
}

/// Stops every running kernel because posconform received `signal` (SIGINT, SIGTERM,
/// SIGHUP): the signal is forwarded to each kernel's process group, and groups still
/// alive after [`GRACE`] are killed. From then on no kernel is started and every
/// pending or later request fails with [`KernelErrorKind::Interrupted`], so a check in
/// progress ends with the results it has. Meant to be called from a signal-handling
/// thread of the binary; returns once every group is gone or killed.
pub fn interrupt(signal: i32) {
    let _ = INTERRUPTED.compare_exchange(0, signal.max(1), Ordering::SeqCst, Ordering::SeqCst);
    let groups = live_groups();
    for &group in &groups {
        signal_group(group, signal);
    }
    // The checking thread notices the signal, ends its kernel and unregisters it;
    // whatever is still registered after the grace period is killed here.
    let deadline = Instant::now() + GRACE;
    while Instant::now() < deadline && !live_groups().is_empty() {
        std::thread::sleep(Duration::from_millis(10));
    }
    kill_all_now();
}

/// Sends SIGKILL to every running kernel's process group at once (a second signal to
/// posconform: the user wants out now).
pub fn kill_all_now() {
    for group in live_groups() {
        kill_group(group);
    }
}

fn live_groups() -> Vec<u32> {
    GROUPS.lock().map(|g| g.clone()).unwrap_or_default()
}

fn register(group: u32) {
    if let Ok(mut g) = GROUPS.lock() {
        g.push(group);
    }
}

fn unregister(group: u32) {
    if let Ok(mut g) = GROUPS.lock() {
        g.retain(|&x| x != group);
    }
}

#[cfg(unix)]
fn signal_group(group: u32, signal: i32) {
    if let Ok(pid) = libc::pid_t::try_from(group) {
        // SAFETY: kill(2) with a negative pid signals a process group; no memory is
        // involved.
        unsafe {
            libc::kill(-pid, signal);
        }
    }
}

#[cfg(unix)]
fn kill_group(group: u32) {
    signal_group(group, libc::SIGKILL);
}

#[cfg(unix)]
fn terminate_signal() -> i32 {
    libc::SIGTERM
}

#[cfg(not(unix))]
fn signal_group(_group: u32, _signal: i32) {}

#[cfg(not(unix))]
fn kill_group(_group: u32) {}

#[cfg(not(unix))]
fn terminate_signal() -> i32 {
    15
}

// ---------------------------------------------------------------------------------
// Threads around one process.

/// What the threads around a process report, in one channel so one deadline covers
/// the request write and the reply.
enum Event {
    /// The request with this id was written in full.
    Written(u64),
    /// Writing the request with this id failed (the kernel closed its stdin or exited).
    WriteFailed(u64, std::io::Error),
    /// A stdout line, without its line feed, and the binary blocks that followed it.
    Line(Vec<u8>, Vec<Vec<u8>>),
    /// Stdout ended in the middle of a message; how many of its bytes had arrived.
    Cut(usize),
    /// A stdout line over the limit, dropped while it was read; its length.
    Oversized(usize),
    /// Stdout ended.
    Eof,
    /// Reading stdout failed.
    ReadFailed(std::io::Error),
    /// The process (the group leader) ended.
    Exited(std::io::Result<ExitStatus>),
}

/// Stderr lines kept for error messages, numbered so an error can show only the lines
/// printed while its request was pending.
#[derive(Default)]
struct Tail {
    lines: VecDeque<(u64, String)>,
    count: u64,
    done: bool,
}

struct Shared {
    tail: Mutex<Tail>,
    changed: Condvar,
}

impl Shared {
    fn push(&self, line: String) {
        if let Ok(mut t) = self.tail.lock() {
            t.count += 1;
            let n = t.count;
            if t.lines.len() == STDERR_TAIL {
                t.lines.pop_front();
            }
            t.lines.push_back((n, line));
        }
        self.changed.notify_all();
    }

    fn finish(&self) {
        if let Ok(mut t) = self.tail.lock() {
            t.done = true;
        }
        self.changed.notify_all();
    }

    fn count(&self) -> u64 {
        self.tail.lock().map(|t| t.count).unwrap_or(0)
    }

    /// Waits until stderr has ended, at most `limit`.
    fn wait_done(&self, limit: Duration) {
        let deadline = Instant::now() + limit;
        let Ok(mut t) = self.tail.lock() else { return };
        while !t.done {
            let left = deadline.saturating_duration_since(Instant::now());
            if left.is_zero() {
                break;
            }
            match self.changed.wait_timeout(t, left) {
                Ok((guard, _)) => t = guard,
                Err(_) => return,
            }
        }
    }

    /// Waits until no stderr line has arrived for a short while (at most 200 ms in all),
    /// so lines a kernel printed just before answering are shown with the answer.
    fn settle(&self) {
        let deadline = Instant::now() + Duration::from_millis(200);
        let Ok(mut t) = self.tail.lock() else { return };
        loop {
            let seen = t.count;
            if t.done || Instant::now() >= deadline {
                break;
            }
            match self.changed.wait_timeout(t, Duration::from_millis(25)) {
                Ok((guard, timeout)) => {
                    t = guard;
                    if timeout.timed_out() && t.count == seen {
                        break;
                    }
                }
                Err(_) => return,
            }
        }
    }

    /// The kept lines numbered after `since`.
    fn lines_after(&self, since: u64) -> Vec<String> {
        self.tail
            .lock()
            .map(|t| {
                t.lines
                    .iter()
                    .filter(|(n, _)| *n > since)
                    .map(|(_, l)| l.clone())
                    .collect()
            })
            .unwrap_or_default()
    }
}

/// The kernel log: one file for every process of a run, and the first write error.
struct Log {
    file: std::fs::File,
    path: PathBuf,
    problem: Option<String>,
}

/// A request for the writer thread: its id and its bytes (the line, then any blocks).
type Request = (u64, Vec<Vec<u8>>);

fn spawn_writer(mut stdin: ChildStdin, events: SyncSender<Event>) -> Sender<Request> {
    let (requests, pending) = mpsc::channel::<Request>();
    std::thread::spawn(move || {
        for (id, parts) in pending {
            let outcome = parts
                .iter()
                .try_for_each(|part| stdin.write_all(part))
                .and_then(|_| stdin.flush());
            let failed = outcome.is_err();
            let event = match outcome {
                Ok(()) => Event::Written(id),
                Err(e) => Event::WriteFailed(id, e),
            };
            if events.send(event).is_err() || failed {
                break;
            }
        }
        // Dropping stdin here closes the kernel's standard input.
    });
    requests
}

/// Reads the blocks announced by a line of the binary framing, within `room` bytes in
/// all: `Ok(blocks)`, or `Err(event)` for a message over the limit (announced: nothing
/// of the blocks is read) or cut short by the end of stdout.
fn read_blocks(
    reader: &mut impl Read,
    lengths: &[u64],
    line_len: usize,
    room: usize,
) -> std::result::Result<Vec<Vec<u8>>, Event> {
    let total = lengths
        .iter()
        .try_fold(0u64, |a, &n| a.checked_add(n))
        .and_then(|n| usize::try_from(n).ok());
    if total.is_none_or(|n| n > room) {
        let announced = total.map_or(usize::MAX, |n| n.saturating_add(line_len + 1));
        return Err(Event::Oversized(announced));
    }
    let mut blocks = Vec::with_capacity(lengths.len());
    let mut received = line_len + 1;
    for &length in lengths {
        let mut block = vec![0u8; length as usize];
        let mut filled = 0;
        while filled < block.len() {
            match reader.read(&mut block[filled..]) {
                Ok(0) => return Err(Event::Cut(received + filled)),
                Ok(n) => filled += n,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                Err(e) => return Err(Event::ReadFailed(e)),
            }
        }
        received += filled;
        blocks.push(block);
    }
    Ok(blocks)
}

fn spawn_stdout_reader(
    stdout: std::process::ChildStdout,
    limit: Arc<AtomicUsize>,
    binary: Arc<AtomicBool>,
    events: SyncSender<Event>,
) {
    std::thread::spawn(move || {
        let mut reader = BufReader::with_capacity(1 << 16, stdout);
        let mut line = Vec::new();
        let mut dropped = 0usize;
        loop {
            let chunk = match reader.fill_buf() {
                Ok([]) => break,
                Ok(chunk) => chunk,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
                Err(e) => {
                    let _ = events.send(Event::ReadFailed(e));
                    return;
                }
            };
            let (part, newline) = match chunk.iter().position(|&b| b == b'\n') {
                Some(i) => (&chunk[..i], true),
                None => (chunk, false),
            };
            let cap = limit.load(Ordering::SeqCst);
            if dropped == 0 && line.len().saturating_add(part.len()) <= cap {
                line.extend_from_slice(part);
            } else {
                // Over the limit: count the bytes, keep none of them.
                dropped = dropped
                    .saturating_add(line.len())
                    .saturating_add(part.len());
                line = Vec::new();
            }
            let used = part.len() + usize::from(newline);
            reader.consume(used);
            if newline {
                let event = if dropped > 0 {
                    Event::Oversized(std::mem::take(&mut dropped))
                } else {
                    let line = std::mem::take(&mut line);
                    let lengths = binary
                        .load(Ordering::SeqCst)
                        .then(|| protocol::block_lengths(&line))
                        .flatten()
                        .unwrap_or_default();
                    if lengths.is_empty() {
                        Event::Line(line, Vec::new())
                    } else {
                        let room = cap.saturating_sub(line.len());
                        match read_blocks(&mut reader, &lengths, line.len(), room) {
                            Ok(blocks) => Event::Line(line, blocks),
                            Err(event) => {
                                // The rest of this stdout is not read: the process is
                                // given up.
                                let _ = events.send(event);
                                return;
                            }
                        }
                    }
                };
                if events.send(event).is_err() {
                    return;
                }
            }
        }
        if dropped > 0 {
            let _ = events.send(Event::Oversized(dropped));
        } else if !line.is_empty() {
            // A last line without its line feed still counts when it is complete JSON;
            // otherwise the kernel stopped writing in the middle of it, which is said
            // as such rather than as a reply that is not JSON.
            let event = if serde_json::from_slice::<serde::de::IgnoredAny>(&line).is_ok() {
                Event::Line(line, Vec::new())
            } else {
                Event::Cut(line.len())
            };
            let _ = events.send(event);
        }
        let _ = events.send(Event::Eof);
    });
}

fn spawn_stderr_reader(
    stderr: std::process::ChildStderr,
    shared: Arc<Shared>,
    log: Option<Arc<Mutex<Log>>>,
) {
    std::thread::spawn(move || {
        let mut reader = stderr;
        let mut buffer = vec![0u8; 1 << 14];
        let mut line: Vec<u8> = Vec::new();
        let mut dropped = 0usize;
        let mut carriage_return = false;
        let emit = |line: &mut Vec<u8>, dropped: &mut usize| {
            let mut text = String::from_utf8_lossy(line).into_owned();
            if *dropped > 0 {
                text.push_str(&format!(
                    " [... {} more bytes of this line dropped]",
                    *dropped
                ));
            }
            line.clear();
            *dropped = 0;
            if let Some(log) = &log {
                if let Ok(mut log) = log.lock() {
                    if log.problem.is_none() {
                        if let Err(e) = writeln!(log.file, "{text}") {
                            log.problem = Some(format!("cannot write {}: {e}", log.path.display()));
                        }
                    }
                }
            }
            shared.push(text);
        };
        loop {
            let n = match reader.read(&mut buffer) {
                Ok(0) => break,
                Ok(n) => n,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
                // An unreadable pipe ends the reader; the kernel then gets EPIPE, as it
                // would on a closed terminal.
                Err(_) => break,
            };
            for &byte in &buffer[..n] {
                if carriage_return {
                    carriage_return = false;
                    if byte == b'\n' {
                        emit(&mut line, &mut dropped);
                        continue;
                    }
                    // A lone `\r` redraws the line: start it over.
                    line.clear();
                    dropped = 0;
                }
                match byte {
                    b'\n' => emit(&mut line, &mut dropped),
                    b'\r' => carriage_return = true,
                    _ if line.len() < MAX_STDERR_LINE => line.push(byte),
                    _ => dropped += 1,
                }
            }
        }
        if !line.is_empty() || dropped > 0 {
            emit(&mut line, &mut dropped);
        }
        shared.finish();
    });
}

/// Watches the group leader and reports when it ends. The child stays shared so that,
/// where there are no process groups, it can still be killed.
fn spawn_waiter(child: Arc<Mutex<Child>>, events: SyncSender<Event>) {
    std::thread::spawn(move || loop {
        let status = match child.lock() {
            Ok(mut c) => c.try_wait(),
            Err(_) => return,
        };
        match status {
            Ok(None) => std::thread::sleep(Duration::from_millis(10)),
            Ok(Some(status)) => {
                let _ = events.send(Event::Exited(Ok(status)));
                return;
            }
            Err(e) => {
                let _ = events.send(Event::Exited(Err(e)));
                return;
            }
        }
    });
}

/// One running kernel process and the threads around it.
struct Running {
    group: u32,
    child: Arc<Mutex<Child>>,
    requests: Option<Sender<Request>>,
    events: Receiver<Event>,
    line_limit: Arc<AtomicUsize>,
    /// Whether this process declared the binary framing in its handshake.
    binary: Arc<AtomicBool>,
    shared: Arc<Shared>,
    exited: Option<ExitStatus>,
}

impl Running {
    /// Ends the process group: SIGTERM to all of it, up to [`GRACE`] for the kernel to
    /// exit, then SIGKILL to whatever is left of the group; then waits (bounded) for
    /// stderr to end so the error shows the last lines.
    fn terminate(&mut self) {
        self.requests = None;
        let started = Instant::now();
        signal_group(self.group, terminate_signal());
        while self.exited.is_none() && started.elapsed() < GRACE {
            // Reaping happens on the waiter thread; this only listens for it.
            match self.events.recv_timeout(Duration::from_millis(10)) {
                Ok(Event::Exited(Ok(status))) => self.exited = Some(status),
                Ok(Event::Exited(Err(_))) | Err(RecvTimeoutError::Disconnected) => break,
                _ => {}
            }
        }
        kill_group(self.group);
        if !cfg!(unix) {
            if let Ok(mut c) = self.child.lock() {
                let _ = c.kill();
            }
        }
        unregister(self.group);
        self.shared.wait_done(DRAIN);
    }
}

/// A kernel behind the stdio protocol.
pub struct StdioKernel {
    argv: Vec<String>,
    timeout: Duration,
    startup_timeout: Duration,
    running: Option<Running>,
    next_id: u64,
    log: Option<Arc<Mutex<Log>>>,
    trace: Option<std::fs::File>,
    starts: usize,
}

impl std::fmt::Debug for StdioKernel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("StdioKernel")
            .field("argv", &self.argv)
            .field("timeout", &self.timeout)
            .finish()
    }
}

/// Splits a command line into arguments the way a POSIX shell would (whitespace
/// separates, `'...'`, `"..."` and backslashes quote), with the `shlex` crate. No shell
/// runs: no variables, globs or pipes.
pub fn split_command(command: &str) -> Result<Vec<String>> {
    let argv = shlex::split(command)
        .ok_or_else(|| Error::param("kernel", "a command with balanced quotes", command))?;
    if argv.is_empty() {
        return Err(Error::param("kernel", "a non-empty command", "\"\""));
    }
    Ok(argv)
}

/// What [`StdioKernel::exchange`] hands back: the reply line and its blocks, and the
/// stderr mark of the request (lines after it were printed while it was pending).
struct Exchanged {
    line: Vec<u8>,
    blocks: Vec<Vec<u8>>,
    since: u64,
}

impl StdioKernel {
    /// A client for `argv` (not started until first used) with a per-request timeout
    /// (the handshake of each new process gets the same unless
    /// [`with_startup_timeout`](Self::with_startup_timeout) says otherwise).
    pub fn new(argv: Vec<String>, timeout: Duration) -> Self {
        StdioKernel {
            argv,
            timeout,
            startup_timeout: timeout,
            running: None,
            next_id: 0,
            log: None,
            trace: None,
            starts: 0,
        }
    }

    /// Allows the handshake of each new process this long instead (start-up, imports).
    pub fn with_startup_timeout(mut self, timeout: Duration) -> Self {
        self.startup_timeout = timeout;
        self
    }

    /// Also records every protocol line, sent (`->`) and received (`<-`), in this file.
    pub fn with_trace(mut self, path: &Path) -> Result<Self> {
        self.trace = Some(crate::files::create_streamed(path)?);
        Ok(self)
    }

    fn record_blocks(&mut self, direction: &str, blocks: &[Vec<u8>]) {
        if self.trace.is_some() && !blocks.is_empty() {
            let bytes: usize = blocks.iter().map(Vec::len).sum();
            let note = format!("[{} binary blocks, {bytes} bytes]", blocks.len());
            self.record(direction, note.as_bytes());
        }
    }

    fn record(&mut self, direction: &str, line: &[u8]) {
        if let Some(f) = self.trace.as_mut() {
            let text = String::from_utf8_lossy(line);
            let _ = writeln!(f, "{direction} {}", text.trim_end());
        }
    }

    /// Also appends the kernel's stderr to this file; errors when it cannot be opened
    /// for appending (later write errors are reported by [`log_problem`](Self::log_problem)).
    pub fn with_log(mut self, path: &Path) -> Result<Self> {
        let file = crate::files::open_append(path)?;
        self.log = Some(Arc::new(Mutex::new(Log {
            file,
            path: path.to_path_buf(),
            problem: None,
        })));
        Ok(self)
    }

    /// The first error writing the kernel log, if there was one.
    pub fn log_problem(&self) -> Option<String> {
        self.log
            .as_ref()
            .and_then(|l| l.lock().ok().and_then(|l| l.problem.clone()))
    }

    /// How many times a process was started.
    pub fn starts(&self) -> usize {
        self.starts
    }

    /// The process group of the running kernel (its leader's pid), if one runs.
    pub fn process_group(&self) -> Option<u32> {
        self.running.as_ref().map(|r| r.group)
    }

    fn who(&self) -> String {
        self.argv.join(" ")
    }

    /// `reason` with the stderr lines numbered after `since`.
    fn with_tail(&self, mut reason: String, since: u64) -> String {
        let lines = self
            .running
            .as_ref()
            .map(|r| r.shared.lines_after(since))
            .unwrap_or_default();
        if !lines.is_empty() {
            reason.push_str("\n  last stderr lines:\n    ");
            reason.push_str(&lines.join("\n    "));
        }
        reason
    }

    /// Gives the process up (the whole group) and builds the error, with the stderr
    /// lines printed since `since`.
    fn fail(&mut self, kind: KernelErrorKind, reason: String, since: u64) -> Error {
        if let Some(r) = self.running.as_mut() {
            r.terminate();
        }
        let reason = self.with_tail(reason, since);
        self.running = None;
        Error::kernel(kind, self.who(), reason)
    }

    /// An error of the case alone: the process stays.
    fn soft(&self, kind: KernelErrorKind, reason: String, since: u64) -> Error {
        if let Some(r) = self.running.as_ref() {
            r.shared.settle();
        }
        Error::kernel(kind, self.who(), self.with_tail(reason, since))
    }

    fn interrupted_error(&mut self, doing: &str) -> Error {
        let signal = interrupted().unwrap_or(0);
        if let Some(r) = self.running.as_mut() {
            r.terminate();
        }
        self.running = None;
        Error::kernel(
            KernelErrorKind::Interrupted,
            self.who(),
            format!("posconform received signal {signal} {doing}; the kernel was stopped"),
        )
    }

    fn start(&mut self) -> Result<()> {
        if interrupted().is_some() {
            return Err(self.interrupted_error("before the kernel started"));
        }
        let program = self.argv.first().cloned().unwrap_or_default();
        let mut command = Command::new(&program);
        command
            .args(self.argv.iter().skip(1))
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped());
        #[cfg(unix)]
        {
            use std::os::unix::process::CommandExt as _;
            command.process_group(0);
        }
        let mut child = command.spawn().map_err(|e| {
            Error::kernel(
                KernelErrorKind::CouldNotStart,
                self.who(),
                format!("cannot start `{program}`: {e}"),
            )
        })?;
        let group = child.id();
        register(group);
        self.starts += 1;
        let (Some(stdin), Some(stdout), Some(stderr)) =
            (child.stdin.take(), child.stdout.take(), child.stderr.take())
        else {
            kill_group(group);
            let _ = child.kill();
            let _ = child.wait();
            unregister(group);
            return Err(Error::kernel(
                KernelErrorKind::CouldNotStart,
                self.who(),
                "the kernel's standard streams could not be connected",
            ));
        };
        // Bounded: a kernel flooding stdout between requests is held back by the pipe,
        // not buffered here without limit.
        let (sender, events) = mpsc::sync_channel(EVENT_QUEUE);
        let line_limit = Arc::new(AtomicUsize::new(MAX_HANDSHAKE_LINE));
        let binary = Arc::new(AtomicBool::new(false));
        let shared = Arc::new(Shared {
            tail: Mutex::new(Tail::default()),
            changed: Condvar::new(),
        });
        let requests = spawn_writer(stdin, sender.clone());
        spawn_stdout_reader(
            stdout,
            Arc::clone(&line_limit),
            Arc::clone(&binary),
            sender.clone(),
        );
        spawn_stderr_reader(stderr, Arc::clone(&shared), self.log.clone());
        let child = Arc::new(Mutex::new(child));
        spawn_waiter(Arc::clone(&child), sender);
        self.running = Some(Running {
            group,
            child,
            requests: Some(requests),
            events,
            line_limit,
            binary,
            shared,
            exited: None,
        });
        Ok(())
    }

    /// Sends one request and waits for its reply line, with one deadline for writing
    /// the request and reading the reply. Any failure ends the process.
    fn exchange(
        &mut self,
        method: &str,
        id: u64,
        message: protocol::Message,
        limit: usize,
        timeout: Duration,
    ) -> Result<Exchanged> {
        self.record("->", message.line.as_bytes());
        self.record_blocks("->", &message.blocks);
        let Some(running) = self.running.as_mut() else {
            return Err(Error::kernel(
                KernelErrorKind::Exited,
                self.who(),
                "no process is running",
            ));
        };
        // The handshake shows what the process printed since it started.
        let since = if method == "handshake" {
            0
        } else {
            running.shared.count()
        };
        running.line_limit.store(limit, Ordering::SeqCst);
        let size = message.len();
        let mut line = message.line.into_bytes();
        line.push(b'\n');
        let mut parts = vec![line];
        parts.extend(message.blocks);
        let sent = running
            .requests
            .as_ref()
            .is_some_and(|r| r.send((id, parts)).is_ok());
        if !sent {
            return Err(self.fail(
                KernelErrorKind::Exited,
                format!("stopped reading its stdin before the `{method}` request"),
                since,
            ));
        }
        let started = Instant::now();
        let deadline = started.checked_add(timeout);
        let mut written = false;
        let mut exited: Option<std::io::Result<ExitStatus>> = None;
        let mut write_failed: Option<std::io::Error> = None;
        let mut stdout_ended = false;
        let mut read_failed: Option<std::io::Error> = None;
        let mut cut: Option<usize> = None;
        // After the process ended (or stdout closed), what is left in the pipe arrives
        // at once; this bounds the wait for it.
        let mut drain_until: Option<Instant> = None;
        loop {
            if interrupted().is_some() {
                return Err(self.interrupted_error(&format!("while the kernel handled `{method}`")));
            }
            let now = Instant::now();
            let mut wait = Duration::from_millis(100);
            if let Some(d) = deadline {
                wait = wait.min(d.saturating_duration_since(now));
            }
            if let Some(d) = drain_until {
                wait = wait.min(d.saturating_duration_since(now));
            }
            let over = deadline.is_some_and(|d| now >= d);
            let drained =
                drain_until.is_some_and(|d| now >= d) || (stdout_ended && exited.is_some());
            if drained || (over && drain_until.is_none()) {
                break;
            }
            let Some(running) = self.running.as_mut() else {
                break;
            };
            match running.events.recv_timeout(wait) {
                Ok(Event::Written(n)) => written |= n == id,
                Ok(Event::WriteFailed(n, _)) if n != id => {}
                Ok(Event::WriteFailed(_, e)) => {
                    write_failed = Some(e);
                    drain_until.get_or_insert(Instant::now() + DRAIN);
                }
                Ok(Event::Line(text, blocks)) => {
                    self.record("<-", &text);
                    self.record_blocks("<-", &blocks);
                    if text.iter().all(u8::is_ascii_whitespace) {
                        continue;
                    }
                    return Ok(Exchanged {
                        line: text,
                        blocks,
                        since,
                    });
                }
                Ok(Event::Cut(received)) => {
                    self.record(
                        "<-",
                        format!("[{received} bytes of a reply that never ended]").as_bytes(),
                    );
                    cut = Some(received);
                }
                Ok(Event::Oversized(length)) => {
                    self.record(
                        "<-",
                        format!("[a reply of {length} bytes, dropped: over the limit]").as_bytes(),
                    );
                    return Err(self.fail(
                        KernelErrorKind::Garbage,
                        format!(
                            "answered `{method}` with a reply of {length} bytes, over the limit of {limit} bytes for this request (dropped unread)"
                        ),
                        since,
                    ));
                }
                Ok(Event::Eof) => {
                    stdout_ended = true;
                    drain_until.get_or_insert(Instant::now() + DRAIN);
                }
                Ok(Event::ReadFailed(e)) => {
                    read_failed = Some(e);
                    stdout_ended = true;
                    drain_until.get_or_insert(Instant::now() + DRAIN);
                }
                Ok(Event::Exited(status)) => {
                    if let Ok(s) = &status {
                        running.exited = Some(*s);
                    }
                    exited = Some(status);
                    drain_until.get_or_insert(Instant::now() + DRAIN);
                }
                Err(RecvTimeoutError::Timeout) => {}
                Err(RecvTimeoutError::Disconnected) => break,
            }
        }
        let status = match &exited {
            Some(Ok(s)) => Some(s.to_string()),
            Some(Err(e)) => Some(format!("status unknown: {e}")),
            None => None,
        };
        let cut_note = cut.map_or(String::new(), |n| {
            format!(" (after {n} bytes of a reply, before it ended)")
        });
        let (kind, why) = match (status, write_failed, stdout_ended) {
            (Some(s), _, _) if !written => (
                KernelErrorKind::Exited,
                format!("exited ({s}) before reading the whole `{method}` request"),
            ),
            (Some(s), _, _) => (
                KernelErrorKind::Exited,
                format!("exited ({s}) while answering `{method}`{cut_note}"),
            ),
            (None, Some(e), _) => (
                KernelErrorKind::Exited,
                format!("stopped reading its stdin during the `{method}` request ({e})"),
            ),
            (None, None, true) => (
                KernelErrorKind::Exited,
                match read_failed {
                    Some(e) => {
                        format!("reading its stdout failed while it answered `{method}`: {e}")
                    }
                    None => format!("closed its stdout while answering `{method}`{cut_note}"),
                },
            ),
            (None, None, false) if !written => (
                KernelErrorKind::Timeout,
                format!(
                    "did not read the `{method}` request ({size} bytes) within {:.1} s (timeout)",
                    timeout.as_secs_f64()
                ),
            ),
            (None, None, false) => (
                KernelErrorKind::Timeout,
                format!(
                    "did not answer `{method}` within {:.1} s (timeout)",
                    timeout.as_secs_f64()
                ),
            ),
        };
        Err(self.fail(kind, why, since))
    }

    /// Ends the running process, if any: shutdown notification, stdin closed, up to
    /// [`GRACE`] to exit, then the process group is terminated.
    fn shut_down(&mut self) {
        let Some(mut r) = self.running.take() else {
            return;
        };
        let note = json!({"jsonrpc": "2.0", "method": "shutdown"}).to_string();
        if let Some(f) = self.trace.as_mut() {
            let _ = writeln!(f, "-> {note}");
        }
        if let Some(requests) = r.requests.take() {
            let _ = requests.send((u64::MAX, vec![format!("{note}\n").into_bytes()]));
            // Dropping the sender ends the writer, which closes the kernel's stdin.
        }
        let deadline = Instant::now() + GRACE;
        while r.exited.is_none() && Instant::now() < deadline {
            match r.events.recv_timeout(Duration::from_millis(20)) {
                Ok(Event::Exited(Ok(status))) => r.exited = Some(status),
                Ok(Event::Exited(Err(_))) | Err(RecvTimeoutError::Disconnected) => break,
                _ => {}
            }
        }
        // Whatever the kernel left behind (children, grandchildren) goes too.
        r.terminate();
    }
}

impl Kernel for StdioKernel {
    fn describe(&mut self) -> Result<KernelInfo> {
        if self.running.is_none() {
            self.start()?;
        }
        let id = self.next_id;
        self.next_id += 1;
        let params = json!({
            "protocol": protocol::PROTOCOL_VERSION,
            "harness": format!("posconform {}", env!("CARGO_PKG_VERSION")),
            "framing": [protocol::BINARY_FRAMING],
        });
        let message = protocol::Message {
            line: protocol::request(id, "handshake", params),
            blocks: Vec::new(),
        };
        let reply = self.exchange(
            "handshake",
            id,
            message,
            MAX_HANDSHAKE_LINE,
            self.startup_timeout,
        )?;
        let who = self.who();
        let parsed =
            protocol::parse_reply(&reply.line, id, "handshake", &who).and_then(|r| match r {
                Reply::Result(raw) => serde_json::from_str::<Value>(raw.get())
                    .map_err(|e| {
                        Error::kernel(KernelErrorKind::Handshake, &who, format!("handshake: {e}"))
                    })
                    .and_then(|v| {
                        let info = protocol::parse_handshake(&v, &who)?;
                        Ok((info, protocol::declares_binary(&v)))
                    }),
                Reply::Error { code, message } => Err(Error::kernel(
                    KernelErrorKind::Handshake,
                    &who,
                    format!("refused the handshake ({code}): {message}"),
                )),
            });
        match parsed {
            Ok((info, binary)) => {
                if let Some(r) = self.running.as_ref() {
                    r.binary.store(binary, Ordering::SeqCst);
                }
                Ok(info)
            }
            Err(e) => {
                let kind = e.kernel_kind().unwrap_or(KernelErrorKind::Handshake);
                let reason = match e {
                    Error::Kernel { reason, .. } => reason,
                    other => other.to_string(),
                };
                Err(self.fail(kind, reason, reply.since))
            }
        }
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        self.answer("run", case, dtype, inputs, None)
    }

    fn restart(&mut self) -> Result<()> {
        if let Some(r) = self.running.as_mut() {
            r.terminate();
        }
        self.running = None;
        self.start()?;
        self.describe().map(drop)
    }

    fn dry_run(
        &mut self,
        case: &Case,
        dtype: Dtype,
        inputs: &Arrays,
        outputs: &std::collections::BTreeMap<String, crate::kernel::ArraySpec>,
    ) -> Result<Option<Answer>> {
        match self.answer("dry_run", case, dtype, inputs, Some(outputs)) {
            Ok(Answer::Outputs { outputs, .. }) => Ok(Some(Answer::Outputs {
                outputs,
                elapsed_ms: None,
            })),
            // An error reply (method not found, most likely): the kernel has no dry run.
            Ok(Answer::Unsupported(_)) => Ok(None),
            Err(e) if e.kernel_kind() == Some(KernelErrorKind::Failed) => Ok(None),
            Err(e) => Err(e),
        }
    }
}

impl StdioKernel {
    /// Sends a `run` (or `dry_run`) request for `case` and reads the outputs from the
    /// reply.
    fn answer(
        &mut self,
        method: &str,
        case: &Case,
        dtype: Dtype,
        inputs: &Arrays,
        outputs: Option<&std::collections::BTreeMap<String, crate::kernel::ArraySpec>>,
    ) -> Result<Answer> {
        if self.running.is_none() {
            self.start()?;
            self.describe()?;
        }
        let id = self.next_id;
        self.next_id += 1;
        let binary = self
            .running
            .as_ref()
            .is_some_and(|r| r.binary.load(Ordering::SeqCst));
        let reply = self.exchange(
            method,
            id,
            protocol::case_request(id, method, case, dtype, inputs, outputs, binary),
            reply_limit(case),
            self.timeout,
        )?;
        let who = self.who();
        let Exchanged {
            line,
            blocks,
            since,
        } = reply;
        let parsed = protocol::parse_reply(&line, id, method, &who).and_then(|r| match r {
            Reply::Result(raw) => protocol::parse_run_result_from(raw, blocks, &who),
            Reply::Error {
                code: UNSUPPORTED,
                message,
            } => Ok(Answer::Unsupported(message)),
            Reply::Error { code, message } => Err(Error::kernel(
                KernelErrorKind::Failed,
                &who,
                format!("reported an error ({code}): {message}"),
            )),
        });
        match parsed {
            Ok(answer) => Ok(answer),
            Err(Error::Kernel { kind, reason, .. }) if kind.needs_restart() => {
                Err(self.fail(kind, reason, since))
            }
            Err(Error::Kernel { kind, reason, .. }) => Err(self.soft(kind, reason, since)),
            Err(other) => Err(other),
        }
    }
}

impl Drop for StdioKernel {
    fn drop(&mut self) {
        self.shut_down();
    }
}
