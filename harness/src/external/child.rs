//! A child process spoken to in JSON Lines over its stdin and stdout, with a deadline on every
//! read. Shared by the external sampler and the external target.

use std::fs::File;
use std::io::{BufRead, BufReader, BufWriter, Write};
use std::path::Path;
use std::process::{Child, ChildStdin, Command, Stdio};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError};
use std::thread;
use std::time::Instant;

use serde_json::Value;

/// Longest line accepted from an external program, newline included: 64 MiB, room for an
/// evaluate batch of about 2.5 million coordinates written at full precision. A longer line
/// (or output without a newline) fails the run that reads it.
pub const MAX_LINE_BYTES: usize = 64 << 20;

/// Read one line of at most `cap` bytes; `None` at the end of the input. A longer line is an
/// error of kind `InvalidData` that names the cap; invalid UTF-8 too.
fn read_bounded_line(r: &mut impl BufRead, cap: usize) -> std::io::Result<Option<String>> {
    let mut line: Vec<u8> = Vec::new();
    loop {
        let buf = match r.fill_buf() {
            Ok(b) => b,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(e),
        };
        if buf.is_empty() {
            break;
        }
        let (take, done) = match buf.iter().position(|&b| b == b'\n') {
            Some(i) => (i + 1, true),
            None => (buf.len(), false),
        };
        if line.len() + take > cap {
            return Err(std::io::Error::new(
                std::io::ErrorKind::InvalidData,
                format!(
                    "it wrote a line longer than the protocol's limit of {} MiB without a \
                     newline",
                    cap >> 20
                ),
            ));
        }
        line.extend_from_slice(&buf[..take]);
        r.consume(take);
        if done {
            break;
        }
    }
    if line.is_empty() {
        return Ok(None);
    }
    String::from_utf8(line).map(Some).map_err(|_| {
        std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            "it wrote a line that is not UTF-8 text",
        )
    })
}

/// A running child process.
pub struct ChildProcess {
    program: String,
    child: Child,
    /// Lines for the child's stdin, written by a thread of their own so that a child that does
    /// not read can never block assay past a deadline.
    stdin: Option<mpsc::Sender<Vec<u8>>>,
    lines: Receiver<std::io::Result<String>>,
    /// Line number of the last line read from the child (1-based), for error messages.
    pub lines_read: usize,
}

impl ChildProcess {
    /// Start `argv` (program and arguments; never through a shell). Its stderr goes to
    /// `stderr_log` when given, else it is discarded.
    pub fn spawn(argv: &[String], stderr_log: Option<&Path>) -> Result<ChildProcess, String> {
        let (program, args) = argv.split_first().ok_or_else(|| {
            "the external command is empty; give [\"program\", \"arg\", ...]".to_string()
        })?;
        let stderr = match stderr_log {
            Some(p) => {
                if let Some(dir) = p.parent() {
                    let _ = std::fs::create_dir_all(dir);
                }
                File::create(p)
                    .map(Stdio::from)
                    .map_err(|e| format!("cannot create the log {}: {e}", p.display()))?
            }
            None => Stdio::null(),
        };
        let mut child = Command::new(program)
            .args(args)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(stderr)
            .spawn()
            .map_err(|e| format!("cannot start `{program}`: {e}"))?;
        let stdout = child
            .stdout
            .take()
            .ok_or_else(|| format!("`{program}`: no stdout pipe"))?;
        let stdin = child.stdin.take().map(|pipe| {
            let (wtx, wrx) = mpsc::channel::<Vec<u8>>();
            thread::spawn(move || {
                let mut w: BufWriter<ChildStdin> = BufWriter::new(pipe);
                for bytes in wrx {
                    if w.write_all(&bytes).and_then(|_| w.flush()).is_err() {
                        break;
                    }
                }
            });
            wtx
        });
        let (tx, rx) = mpsc::channel();
        thread::spawn(move || {
            let mut r = BufReader::new(stdout);
            loop {
                match read_bounded_line(&mut r, MAX_LINE_BYTES) {
                    Ok(None) => break,
                    Ok(Some(s)) => {
                        if tx.send(Ok(s)).is_err() {
                            break;
                        }
                    }
                    Err(e) => {
                        // Also a line over the cap: nothing more is read, so a program that
                        // writes without end cannot make assay's memory grow.
                        let _ = tx.send(Err(e));
                        break;
                    }
                }
            }
        });
        Ok(ChildProcess {
            program: program.clone(),
            child,
            stdin,
            lines: rx,
            lines_read: 0,
        })
    }

    /// The program's name, for messages.
    pub fn program(&self) -> &str {
        &self.program
    }

    /// Send one JSON value as one line.
    pub fn send(&mut self, v: &Value) -> Result<(), String> {
        let program = self.program.clone();
        let w = self
            .stdin
            .as_mut()
            .ok_or_else(|| format!("`{program}`: its stdin is closed"))?;
        let mut line = serde_json::to_string(v).map_err(|e| e.to_string())?;
        line.push('\n');
        w.send(line.into_bytes())
            .map_err(|_| format!("`{program}` stopped reading its input"))
    }

    /// Read one line and parse it as a JSON object, waiting until `deadline` at most.
    pub fn receive(&mut self, deadline: Option<Instant>) -> Result<Value, String> {
        let got = match deadline {
            None => self
                .lines
                .recv()
                .map_err(|_| RecvTimeoutError::Disconnected),
            Some(d) => {
                let wait = d.saturating_duration_since(Instant::now());
                self.lines.recv_timeout(wait)
            }
        };
        match got {
            Ok(Ok(line)) => {
                self.lines_read += 1;
                let v: Value = serde_json::from_str(line.trim()).map_err(|e| {
                    format!(
                        "`{}` wrote a malformed line {} ({e}): {}",
                        self.program,
                        self.lines_read,
                        abbreviate(line.trim())
                    )
                })?;
                if !v.is_object() {
                    return Err(format!(
                        "`{}` wrote line {} that is not a JSON object: {}",
                        self.program,
                        self.lines_read,
                        abbreviate(line.trim())
                    ));
                }
                Ok(v)
            }
            Ok(Err(e)) => Err(format!("cannot read from `{}`: {e}", self.program)),
            Err(RecvTimeoutError::Timeout) => Err(format!(
                "`{}` exceeded the time limit (timeout_s) and was stopped",
                self.program
            )),
            Err(RecvTimeoutError::Disconnected) => {
                // Its output is closed; give it until the deadline (at most a short grace
                // period) to exit, then stop it.
                let grace = Instant::now() + std::time::Duration::from_millis(500);
                let until = deadline.map_or(grace, |d| d.min(grace));
                let status = loop {
                    match self.child.try_wait() {
                        Ok(Some(s)) => break Some(s),
                        Ok(None) if Instant::now() < until => {
                            thread::sleep(std::time::Duration::from_millis(2))
                        }
                        _ => {
                            let _ = self.child.kill();
                            let _ = self.child.wait();
                            break None;
                        }
                    }
                };
                Err(match status {
                    Some(s) if !s.success() => {
                        format!("`{}` exited early with {s} (see its log)", self.program)
                    }
                    _ => format!("`{}` closed its output before finishing", self.program),
                })
            }
        }
    }

    /// Close stdin and wait for a clean exit, until `deadline` at most (10 s when there is
    /// none); a non-zero exit is an error.
    pub fn finish(mut self, deadline: Option<Instant>) -> Result<(), String> {
        self.stdin = None;
        let deadline =
            Some(deadline.unwrap_or_else(|| Instant::now() + std::time::Duration::from_secs(10)));
        loop {
            match self.child.try_wait() {
                Ok(Some(s)) if s.success() => return Ok(()),
                Ok(Some(s)) => {
                    return Err(format!("`{}` exited with {s} (see its log)", self.program));
                }
                Ok(None) => {
                    if deadline.is_some_and(|d| Instant::now() >= d) {
                        return Err(format!(
                            "`{}` did not exit within the time limit and was stopped",
                            self.program
                        ));
                    }
                    thread::sleep(std::time::Duration::from_millis(2));
                }
                Err(e) => return Err(format!("cannot wait for `{}`: {e}", self.program)),
            }
        }
    }
}

impl Drop for ChildProcess {
    fn drop(&mut self) {
        // A child still running here is one we gave up on: never leave it behind.
        if let Ok(None) = self.child.try_wait() {
            let _ = self.child.kill();
        }
        let _ = self.child.wait();
    }
}

fn abbreviate(s: &str) -> String {
    if s.chars().count() > 120 {
        format!("{}…", s.chars().take(120).collect::<String>())
    } else {
        s.to_string()
    }
}

/// JSON for a log density: non-finite values become null.
pub fn density_json(x: f64) -> Value {
    if x.is_finite() {
        Value::from(x)
    } else {
        Value::Null
    }
}

/// Parse a list of points of dimension `dim` from a JSON value, into a flat buffer.
pub fn parse_points(v: &Value, dim: usize, out: &mut Vec<f64>) -> Result<usize, String> {
    let pts = v
        .as_array()
        .ok_or_else(|| "`points` must be a list of points".to_string())?;
    out.clear();
    for (i, p) in pts.iter().enumerate() {
        let p = p
            .as_array()
            .ok_or_else(|| format!("point {i} is not a list of numbers"))?;
        if p.len() != dim {
            return Err(format!(
                "point {i} has {} coordinates; the target has dim = {dim}",
                p.len()
            ));
        }
        for x in p {
            out.push(
                x.as_f64().ok_or_else(|| {
                    format!("point {i} has a coordinate that is not a number: {x}")
                })?,
            );
        }
    }
    Ok(pts.len())
}
