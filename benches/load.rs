//! A meeting's load on the real server: `gapwise serve` on the demo as its own process,
//! 50 concurrent clients each making 40 requests over every page, twin and download linked
//! from the overview (`common/routes.rs`, shared with the page benchmark; each client
//! starts at another route, so cold and cached requests
//! mix). Reports errors, latency percentiles, the server's peak memory and its memory
//! after the load. Targets: no error, 99th percentile under 1 s, memory bounded.
//!
//!     cargo bench --bench load

use std::io::{BufRead, BufReader, Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::process::{Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

const CLIENTS: usize = 50;
const REQUESTS_PER_CLIENT: usize = 40;

#[path = "common/routes.rs"]
mod routes;
use routes::ROUTES;

/// Memory of a process in MB from /proc (Linux): (current resident, peak resident).
fn memory_mb(pid: u32) -> Option<(f64, f64)> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let field = |name: &str| {
        status
            .lines()
            .find(|l| l.starts_with(name))
            .and_then(|l| l.split_whitespace().nth(1))
            .and_then(|v| v.parse::<f64>().ok())
            .map(|kb| kb / 1024.0)
    };
    Some((field("VmRSS:")?, field("VmHWM:")?))
}

/// One GET with `Connection: close`; the status code, or an error.
fn get(addr: SocketAddr, extra_headers: &str, path: &str) -> Result<u16, String> {
    let mut stream = TcpStream::connect(addr).map_err(|e| e.to_string())?;
    stream
        .set_read_timeout(Some(Duration::from_secs(60)))
        .map_err(|e| e.to_string())?;
    write!(
        stream,
        "GET {path} HTTP/1.1\r\nHost: {addr}\r\n{extra_headers}Connection: close\r\n\r\n"
    )
    .map_err(|e| e.to_string())?;
    let mut response = Vec::new();
    stream
        .read_to_end(&mut response)
        .map_err(|e| e.to_string())?;
    let head = String::from_utf8_lossy(&response[..response.len().min(64)]).to_string();
    head.split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .ok_or_else(|| format!("no status line in {head:?}"))
}

fn percentile(sorted: &[f64], p: f64) -> f64 {
    let i = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[i.min(sorted.len() - 1)]
}

fn main() {
    let mut server = Command::new(env!("CARGO_BIN_EXE_gapwise"))
        .args(["serve", "--addr", "127.0.0.1:0"])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("start gapwise serve");
    let pid = server.id();
    let mut lines = BufReader::new(server.stdout.take().expect("stdout"));
    let mut printed = String::new();
    let mut addr = None;
    let mut key = None;
    for _ in 0..10 {
        let mut line = String::new();
        if lines.read_line(&mut line).unwrap_or(0) == 0 {
            break;
        }
        printed.push_str(&line);
        if let Some(url) = line.split_whitespace().find(|w| w.starts_with("http://")) {
            let rest = &url["http://".len()..];
            let host = rest.split('/').next().unwrap_or(rest);
            addr = host.parse::<SocketAddr>().ok();
            key = rest.split_once("key=").map(|(_, k)| {
                k.trim_end_matches(|c: char| !c.is_ascii_alphanumeric())
                    .to_string()
            });
            break;
        }
    }
    let addr = addr.unwrap_or_else(|| panic!("no address in {printed:?}"));
    let extra = key.map_or_else(String::new, |k| format!("x-gapwise-key: {k}\r\n"));
    let before = memory_mb(pid);

    let latencies = Arc::new(Mutex::new(Vec::with_capacity(
        CLIENTS * REQUESTS_PER_CLIENT,
    )));
    let errors = Arc::new(Mutex::new(Vec::new()));
    let peak = Arc::new(Mutex::new(0.0f64));
    let watching = Arc::new(std::sync::atomic::AtomicBool::new(true));
    let watcher = {
        let (peak, watching) = (Arc::clone(&peak), Arc::clone(&watching));
        std::thread::spawn(move || {
            while watching.load(std::sync::atomic::Ordering::SeqCst) {
                if let Some((rss, _)) = memory_mb(pid) {
                    let mut p = peak.lock().expect("peak");
                    *p = p.max(rss);
                }
                std::thread::sleep(Duration::from_millis(20));
            }
        })
    };
    let start = Instant::now();
    let clients: Vec<_> = (0..CLIENTS)
        .map(|c| {
            let (latencies, errors, extra) =
                (Arc::clone(&latencies), Arc::clone(&errors), extra.clone());
            std::thread::spawn(move || {
                for r in 0..REQUESTS_PER_CLIENT {
                    let route = ROUTES[(c * 7 + r) % ROUTES.len()];
                    let t = Instant::now();
                    let outcome = get(addr, &extra, route);
                    let ms = t.elapsed().as_secs_f64() * 1000.0;
                    latencies.lock().expect("latencies").push(ms);
                    match outcome {
                        Ok(200) => {}
                        Ok(code) => errors
                            .lock()
                            .expect("errors")
                            .push(format!("{route}: {code}")),
                        Err(e) => errors.lock().expect("errors").push(format!("{route}: {e}")),
                    }
                }
            })
        })
        .collect();
    for c in clients {
        c.join().expect("client");
    }
    let wall = start.elapsed().as_secs_f64();
    watching.store(false, std::sync::atomic::Ordering::SeqCst);
    watcher.join().expect("watcher");
    std::thread::sleep(Duration::from_millis(500));
    let after = memory_mb(pid);
    let _ = server.kill();
    let _ = server.wait();

    let mut l = latencies.lock().expect("latencies").clone();
    l.sort_by(f64::total_cmp);
    let errors = errors.lock().expect("errors").clone();
    println!(
        "{CLIENTS} clients x {REQUESTS_PER_CLIENT} requests over {} routes: {} requests in {wall:.1} s",
        ROUTES.len(),
        l.len()
    );
    println!(
        "latency ms: median {:.1}, 90th {:.1}, 99th {:.1}, max {:.1} (target: 99th under 1000)",
        percentile(&l, 0.5),
        percentile(&l, 0.9),
        percentile(&l, 0.99),
        l.last().copied().unwrap_or(0.0)
    );
    println!("errors: {} (target 0)", errors.len());
    for e in errors.iter().take(10) {
        println!("  {e}");
    }
    if let (Some((rss0, _)), Some((rss1, hwm))) = (before, after) {
        println!(
            "server memory MB: {rss0:.0} before, peak {:.0} (kernel's high-water mark {hwm:.0}), {rss1:.0} after",
            *peak.lock().expect("peak")
        );
    }
}
