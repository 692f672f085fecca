//! Times solve requests in-process, without HTTP, phase by phase: the benchmark's view of the
//! engine. Each argument is a file holding a `POST /v1/solve` body; for each, one line of JSON:
//! `{"file", "parse_s", "validate_s", "solve_s", "peak_bytes", "method", "error"}`.
//!
//! Run one file per process to read its peak memory (`VmHWM`, the process's high-water mark):
//! `cargo run --release -p oddsmith --example in_process -- request.json`.

use std::time::{Duration, Instant};

use oddsmith::model::validate::validate;
use oddsmith::solve::budget::Budget;
use oddsmith::solve::solve;
use oddsmith::sweep::plan;
use oddsmith_client::types::SolveRequest;
use serde_json::json;

fn peak_bytes() -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}

fn main() {
    for file in std::env::args().skip(1) {
        let body = std::fs::read(&file).unwrap_or_else(|e| panic!("cannot read {file}: {e}"));
        let started = Instant::now();
        let request: SolveRequest = match serde_json::from_slice(&body) {
            Ok(request) => request,
            Err(e) => {
                println!(
                    "{}",
                    json!({"file": file, "error": format!("not a request: {e}")})
                );
                continue;
            }
        };
        let parse_s = started.elapsed().as_secs_f64();
        let validated = Instant::now();
        let chain = validate(&request.chain, &request.parameters);
        let validate_s = validated.elapsed().as_secs_f64();
        let (chain, plan) = match (chain, plan(&request)) {
            (Ok(chain), Ok(plan)) => (chain, plan),
            (Err(issues), _) => {
                println!(
                    "{}",
                    json!({"file": file, "error": format!("invalid: {issues:?}")})
                );
                continue;
            }
            (_, Err(e)) => {
                println!(
                    "{}",
                    json!({"file": file, "error": format!("invalid: {e}")})
                );
                continue;
            }
        };
        let solving = Instant::now();
        let answer = solve(&chain, &plan, &Budget::new(Duration::from_secs(3600)));
        let solve_s = solving.elapsed().as_secs_f64();
        let (method, error) = match answer {
            Ok(answer) => (Some(answer.solver.method), None),
            Err(e) => (None, Some(e.to_string())),
        };
        println!(
            "{}",
            json!({
                "file": file, "parse_s": parse_s, "validate_s": validate_s, "solve_s": solve_s,
                "peak_bytes": peak_bytes(), "method": method, "error": error,
            })
        );
    }
}
