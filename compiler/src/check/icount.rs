//! Instruction counts from SysTick under QEMU's `-icount shift=0`.
//!
//! With `-icount shift=0` QEMU advances its virtual clock by exactly one
//! nanosecond per executed guest instruction, and the Cortex-M SysTick
//! (clock source = core clock) counts that virtual time at the board's
//! core clock (25 MHz on the MPS2 boards, 20 MHz on AN505). So one tick is a
//! fixed number of instructions, 40 or 50. Rather than trusting those
//! numbers, [`calibrate`] measures the factor: a calibration firmware times
//! loops of a known instruction sequence (100 `nop` + `subs` + `bne` per
//! iteration, written with `asm!` so the count is exact) and the factor is
//! the slope of instructions over ticks. A count therefore has a resolution
//! of one tick (±40 or ±50 instructions).
//!
//! DWT's cycle counter is not used: QEMU does not model it (it reads 0).
//! These are instruction counts on the core's real instruction set, not
//! cycles.

use super::runner::{self, BuildConfig, Kind, RunDir};
use super::{CheckError, Result, RunOn};
use serde::Serialize;
use std::collections::HashMap;
use std::sync::Mutex;

/// Instructions in one iteration of the calibration loop.
pub const INSTRUCTIONS_PER_ITERATION: u64 = 102;

/// One timed loop.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct CalPoint {
    /// Loop iterations.
    pub iterations: u64,
    /// Instructions executed in the loop (`iterations · 102`).
    pub instructions: u64,
    /// SysTick ticks measured around it.
    pub ticks: u64,
}

/// The measured tick-to-instruction factor of one board.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Calibration {
    /// Which core/board.
    pub on: RunOn,
    /// QEMU machine.
    pub machine: String,
    /// Instructions per SysTick tick (slope over the calibration points).
    pub instructions_per_tick: f64,
    /// Ticks between two back-to-back timer reads.
    pub timer_overhead_ticks: u64,
    /// The measurements.
    pub points: Vec<CalPoint>,
    /// Largest |predicted − known| instructions over the points.
    pub max_error_instructions: f64,
}

impl Calibration {
    /// Derives the factor from measured points (at least two distinct
    /// sizes): least-squares slope of instructions over ticks.
    pub fn from_points(
        on: RunOn,
        timer_overhead_ticks: u64,
        points: Vec<CalPoint>,
    ) -> Result<Calibration> {
        let n = points.len() as f64;
        if points.len() < 2 {
            return Err(CheckError::Format {
                file: "calibration".into(),
                detail: "fewer than two calibration points".into(),
            });
        }
        let mx = points.iter().map(|p| p.ticks as f64).sum::<f64>() / n;
        let my = points.iter().map(|p| p.instructions as f64).sum::<f64>() / n;
        let sxx: f64 = points.iter().map(|p| (p.ticks as f64 - mx).powi(2)).sum();
        let sxy: f64 = points
            .iter()
            .map(|p| (p.ticks as f64 - mx) * (p.instructions as f64 - my))
            .sum();
        if sxx == 0.0 {
            return Err(CheckError::Format {
                file: "calibration".into(),
                detail: "all calibration loops took the same number of ticks (is -icount on?)"
                    .into(),
            });
        }
        let f = sxy / sxx;
        let max_error_instructions = points
            .iter()
            .map(|p| (p.ticks as f64 * f - p.instructions as f64).abs())
            .fold(0.0, f64::max);
        Ok(Calibration {
            on,
            machine: on
                .board()
                .map(|b| b.machine.to_string())
                .unwrap_or_default(),
            instructions_per_tick: f,
            timer_overhead_ticks,
            points,
            max_error_instructions,
        })
    }

    /// Ticks to instructions.
    pub fn instructions(&self, ticks: u64) -> u64 {
        (ticks as f64 * self.instructions_per_tick).round() as u64
    }
}

/// Parses the calibration firmware's console.
pub fn parse_console(console: &str) -> Result<(u64, Vec<CalPoint>)> {
    let mut overhead = None;
    let mut points = Vec::new();
    for line in console.lines() {
        let mut it = line.split_whitespace();
        match it.next() {
            Some("INGOT-CAL-OVERHEAD") => overhead = it.next().and_then(|v| v.parse().ok()),
            Some("INGOT-CAL") => {
                let iterations: u64 = it.next().and_then(|v| v.parse().ok()).unwrap_or(0);
                let ticks: u64 = it.next().and_then(|v| v.parse().ok()).unwrap_or(0);
                points.push(CalPoint {
                    iterations,
                    instructions: iterations * INSTRUCTIONS_PER_ITERATION,
                    ticks,
                });
            }
            _ => {}
        }
    }
    match overhead {
        Some(o) if !points.is_empty() => Ok((o, points)),
        _ => Err(CheckError::Format {
            file: "calibration console".into(),
            detail: format!("no INGOT-CAL lines in:\n{console}"),
        }),
    }
}

type CacheKey = (RunOn, std::path::PathBuf);
static CACHE: Mutex<Option<HashMap<CacheKey, Calibration>>> = Mutex::new(None);

/// Builds and runs the calibration firmware on `on`'s board (cached per
/// process and build directory).
pub fn calibrate(on: RunOn, cfg: &BuildConfig) -> Result<Calibration> {
    let board = on.board().ok_or_else(|| CheckError::Run {
        what: "calibration".into(),
        detail: "the host has no instruction counter; pick an emulated core".into(),
    })?;
    let key = (on, cfg.build_dir.clone());
    if let Some(c) = CACHE.lock().unwrap().as_ref().and_then(|m| m.get(&key)) {
        return Ok(c.clone());
    }
    runner::require_qemu(&cfg.qemu)?;
    let r = runner::build_project(Kind::Calibration(on), None, cfg)?;
    let dir = RunDir::new(cfg)?;
    let (ok, console) = runner::run_with_timeout(
        runner::qemu_command(&cfg.qemu, &board, &r.binary),
        &dir.0,
        cfg.timeout,
        "calibration",
    )?;
    if !ok {
        return Err(CheckError::Run {
            what: "calibration".into(),
            detail: console,
        });
    }
    let (overhead, points) = parse_console(&console)?;
    let cal = Calibration::from_points(on, overhead, points)?;
    CACHE
        .lock()
        .unwrap()
        .get_or_insert_with(HashMap::new)
        .insert(key, cal.clone());
    Ok(cal)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slope_is_recovered_and_bad_consoles_are_rejected() {
        let console = "INGOT-CAL-OVERHEAD 0\nINGOT-CAL 1000 2550\nINGOT-CAL 10000 25500\nnoise\n";
        let (o, pts) = parse_console(console).unwrap();
        assert_eq!(o, 0);
        assert_eq!(pts[1].instructions, 1_020_000);
        let c = Calibration::from_points(RunOn::M4, o, pts).unwrap();
        assert!(
            (c.instructions_per_tick - 40.0).abs() < 1e-9,
            "{}",
            c.instructions_per_tick
        );
        assert_eq!(c.instructions(25), 1000);
        assert!(parse_console("hello\n").is_err());
        let flat = vec![
            CalPoint {
                iterations: 1,
                instructions: 102,
                ticks: 5,
            },
            CalPoint {
                iterations: 2,
                instructions: 204,
                ticks: 5,
            },
        ];
        assert!(Calibration::from_points(RunOn::M4, 0, flat).is_err());
    }
}
