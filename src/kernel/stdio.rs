//! The stdio client: runs a team's kernel as a child process and speaks protocol v1
//! (docs/protocol.md) over its stdin and stdout.
//!
//! The kernel's stdout is read on a thread and handed over through a channel, so a
//! request can time out; stderr is read on another thread into a bounded tail (shown
//! when a case errors) and, on request, a log file. Any failure to answer kills the
//! process; [`Kernel::restart`] starts a new one and repeats the handshake.

use std::collections::VecDeque;
use std::io::{BufRead, BufReader, Write};
use std::path::PathBuf;
use std::process::{Child, ChildStdin, Command, Stdio};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use serde_json::{json, Value};

use crate::case::{Arrays, Case};
use crate::error::{Error, Result};
use crate::kernel::protocol::{self, UNSUPPORTED};
use crate::kernel::{Answer, Kernel, KernelInfo};
use crate::precision::Dtype;

/// How many stderr lines the client keeps for error messages.
const STDERR_TAIL: usize = 12;
/// Longest stdout line accepted (a protocol reply carrying arrays; 1 GiB).
const MAX_LINE: usize = 1 << 30;

struct Running {
    child: Child,
    stdin: ChildStdin,
    lines: Receiver<std::io::Result<String>>,
}

/// A kernel behind the stdio protocol.
pub struct StdioKernel {
    argv: Vec<String>,
    timeout: Duration,
    running: Option<Running>,
    next_id: u64,
    stderr_tail: Arc<Mutex<VecDeque<String>>>,
    log: Option<PathBuf>,
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

/// Splits a command line on whitespace, keeping `'...'` and `"..."` together (no shell
/// is involved: no variables, globs or pipes).
pub fn split_command(command: &str) -> Result<Vec<String>> {
    let mut argv = Vec::new();
    let mut current = String::new();
    let mut quote: Option<char> = None;
    let mut started = false;
    for c in command.chars() {
        match (quote, c) {
            (Some(q), c) if c == q => quote = None,
            (Some(_), c) => current.push(c),
            (None, '\'' | '"') => {
                quote = Some(c);
                started = true;
            }
            (None, c) if c.is_whitespace() => {
                if started || !current.is_empty() {
                    argv.push(std::mem::take(&mut current));
                    started = false;
                }
            }
            (None, c) => current.push(c),
        }
    }
    if quote.is_some() {
        return Err(Error::param(
            "kernel",
            "a command with balanced quotes",
            command,
        ));
    }
    if started || !current.is_empty() {
        argv.push(current);
    }
    if argv.is_empty() {
        return Err(Error::param("kernel", "a non-empty command", "\"\""));
    }
    Ok(argv)
}

impl StdioKernel {
    /// A client for `argv` (not started until first used) with a per-request timeout.
    pub fn new(argv: Vec<String>, timeout: Duration) -> Self {
        StdioKernel {
            argv,
            timeout,
            running: None,
            next_id: 0,
            stderr_tail: Arc::new(Mutex::new(VecDeque::new())),
            log: None,
            trace: None,
            starts: 0,
        }
    }

    /// Also records every protocol line, sent (`->`) and received (`<-`), in this file.
    pub fn with_trace(mut self, path: &std::path::Path) -> Result<Self> {
        let file = std::fs::File::create(path).map_err(|e| Error::io("create", path, e))?;
        self.trace = Some(file);
        Ok(self)
    }

    fn record(&mut self, direction: &str, line: &str) {
        if let Some(f) = self.trace.as_mut() {
            let _ = writeln!(f, "{direction} {}", line.trim_end());
        }
    }

    /// Also appends the kernel's stderr to this file.
    pub fn with_log(mut self, path: PathBuf) -> Self {
        self.log = Some(path);
        self
    }

    /// How many times a process was started.
    pub fn starts(&self) -> usize {
        self.starts
    }

    fn who(&self) -> String {
        self.argv.join(" ")
    }

    fn fail(&mut self, reason: impl Into<String>) -> Error {
        let mut reason = reason.into();
        self.stop_hard();
        // Give the stderr thread a moment to collect a crash message.
        std::thread::sleep(Duration::from_millis(50));
        let tail: Vec<String> = self
            .stderr_tail
            .lock()
            .map(|t| t.iter().cloned().collect())
            .unwrap_or_default();
        if !tail.is_empty() {
            reason.push_str("\n  last stderr lines:\n    ");
            reason.push_str(&tail.join("\n    "));
        }
        Error::Kernel {
            kernel: self.who(),
            reason,
        }
    }

    fn start(&mut self) -> Result<()> {
        let mut command = Command::new(&self.argv[0]);
        command
            .args(&self.argv[1..])
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped());
        let mut child = command.spawn().map_err(|e| Error::Kernel {
            kernel: self.who(),
            reason: format!("cannot start `{}`: {e}", self.argv[0]),
        })?;
        self.starts += 1;
        let stdin = child.stdin.take().expect("piped");
        let stdout = child.stdout.take().expect("piped");
        let stderr = child.stderr.take().expect("piped");
        let (sender, lines) = mpsc::channel();
        std::thread::spawn(move || {
            let mut reader = BufReader::new(stdout);
            loop {
                let mut line = String::new();
                match std::io::Read::take(&mut reader, MAX_LINE as u64).read_line(&mut line) {
                    Ok(0) => break,
                    Ok(_) => {
                        if sender.send(Ok(line)).is_err() {
                            break;
                        }
                    }
                    Err(e) => {
                        let _ = sender.send(Err(e));
                        break;
                    }
                }
            }
        });
        let tail = Arc::clone(&self.stderr_tail);
        if let Ok(mut t) = tail.lock() {
            t.clear();
        }
        let mut log = self.log.as_ref().and_then(|p| {
            std::fs::OpenOptions::new()
                .create(true)
                .append(true)
                .open(p)
                .ok()
        });
        std::thread::spawn(move || {
            for line in BufReader::new(stderr)
                .lines()
                .map_while(std::result::Result::ok)
            {
                if let Some(f) = log.as_mut() {
                    let _ = writeln!(f, "{line}");
                }
                if let Ok(mut t) = tail.lock() {
                    if t.len() == STDERR_TAIL {
                        t.pop_front();
                    }
                    t.push_back(line);
                }
            }
        });
        self.running = Some(Running {
            child,
            stdin,
            lines,
        });
        Ok(())
    }

    fn stop_hard(&mut self) {
        if let Some(mut r) = self.running.take() {
            let _ = r.child.kill();
            let _ = r.child.wait();
        }
    }

    /// Sends one request and waits for its response: `Ok(Ok(result))`, `Ok(Err((code,
    /// message)))` for a JSON-RPC error, or `Err` when the kernel failed to answer.
    fn call(
        &mut self,
        method: &str,
        params: Value,
    ) -> Result<std::result::Result<Value, (i64, String)>> {
        if self.running.is_none() {
            self.start()?;
        }
        let id = self.next_id;
        self.next_id += 1;
        let line = protocol::request(id, method, params);
        self.record("->", &line);
        let timeout = self.timeout;
        let running = self.running.as_mut().expect("started");
        if writeln!(running.stdin, "{line}")
            .and_then(|_| running.stdin.flush())
            .is_err()
        {
            let status = running.child.try_wait().ok().flatten();
            let why = match status {
                Some(s) => format!("exited ({s}) before the `{method}` request"),
                None => format!("stopped reading its stdin before the `{method}` request"),
            };
            return Err(self.fail(why));
        }
        let deadline = std::time::Instant::now() + timeout;
        loop {
            let running = self.running.as_mut().expect("started");
            let remaining = deadline.saturating_duration_since(std::time::Instant::now());
            match running.lines.recv_timeout(remaining) {
                Ok(Ok(text)) => {
                    self.record("<-", &text);
                    let trimmed = text.trim();
                    if trimmed.is_empty() {
                        continue;
                    }
                    let reply: Value = match serde_json::from_str(trimmed) {
                        Ok(v) => v,
                        Err(_) => {
                            let shown: String = trimmed.chars().take(200).collect();
                            return Err(self.fail(format!(
                                "printed something that is not a JSON-RPC response on stdout (answering `{method}`): {shown:?}"
                            )));
                        }
                    };
                    if reply.get("id") != Some(&json!(id)) {
                        let got = reply.get("id").cloned().unwrap_or(Value::Null);
                        return Err(
                            self.fail(format!("answered `{method}` request {id} with id {got}"))
                        );
                    }
                    if let Some(error) = reply.get("error") {
                        let code = error.get("code").and_then(Value::as_i64).unwrap_or(0);
                        let message = error
                            .get("message")
                            .and_then(Value::as_str)
                            .unwrap_or("")
                            .to_string();
                        return Ok(Err((code, message)));
                    }
                    return match reply.get("result") {
                        Some(result) => Ok(Ok(result.clone())),
                        None => Err(self.fail(format!(
                            "reply to `{method}` has neither `result` nor `error`"
                        ))),
                    };
                }
                Ok(Err(e)) => return Err(self.fail(format!("reading its stdout failed: {e}"))),
                Err(RecvTimeoutError::Timeout) => {
                    return Err(self.fail(format!(
                        "did not answer `{method}` within {:.1} s (timeout)",
                        timeout.as_secs_f64()
                    )))
                }
                Err(RecvTimeoutError::Disconnected) => {
                    std::thread::sleep(Duration::from_millis(20));
                    let status = running.child.try_wait().ok().flatten();
                    let why = match status {
                        Some(s) => format!("exited ({s}) while answering `{method}`"),
                        None => format!("closed its stdout while answering `{method}`"),
                    };
                    return Err(self.fail(why));
                }
            }
        }
    }
}

impl Kernel for StdioKernel {
    fn describe(&mut self) -> Result<KernelInfo> {
        let params = json!({"protocol": protocol::PROTOCOL_VERSION, "harness": format!("posconform {}", env!("CARGO_PKG_VERSION"))});
        match self.call("handshake", params)? {
            Ok(result) => protocol::parse_handshake(&result, &self.who()),
            Err((code, message)) => {
                Err(self.fail(format!("refused the handshake ({code}): {message}")))
            }
        }
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        match self.call("run", protocol::run_params(case, dtype, inputs))? {
            Ok(result) => protocol::parse_outputs(&result, &self.who()),
            Err((UNSUPPORTED, message)) => Ok(Answer::Unsupported(message)),
            Err((code, message)) => Err(Error::Kernel {
                kernel: self.who(),
                reason: format!("reported an error ({code}): {message}"),
            }),
        }
    }

    fn restart(&mut self) -> Result<()> {
        self.stop_hard();
        self.start()?;
        self.describe().map(drop)
    }
}

impl Drop for StdioKernel {
    fn drop(&mut self) {
        if self.running.is_some() {
            self.record(
                "->",
                &json!({"jsonrpc": "2.0", "method": "shutdown"}).to_string(),
            );
        }
        if let Some(mut r) = self.running.take() {
            let _ = writeln!(
                r.stdin,
                "{}",
                json!({"jsonrpc": "2.0", "method": "shutdown"})
            );
            let _ = r.stdin.flush();
            drop(r.stdin);
            let deadline = std::time::Instant::now() + Duration::from_secs(2);
            loop {
                match r.child.try_wait() {
                    Ok(Some(_)) => break,
                    Ok(None) if std::time::Instant::now() < deadline => {
                        std::thread::sleep(Duration::from_millis(10))
                    }
                    _ => {
                        let _ = r.child.kill();
                        let _ = r.child.wait();
                        break;
                    }
                }
            }
        }
    }
}
