//! The binary files the runners read and write. All integers little-endian.
//!
//! * inputs: `b"INGI"`, `u32 count`, `u32 input_len`, then `count ·
//!   input_len` int8 codes.
//! * frames (camera runs, instead of inputs): `b"INGF"`, `u32 count`,
//!   `u32 frame_bytes`, then `count · frame_bytes` raw camera-frame bytes.
//!   The runner calls the module's `frame_to_input` on each frame and also
//!   writes the input codes it computed as `codes.bin`, in the inputs
//!   layout above.
//! * outputs: `b"INGO"`, `u32 count`, `u32 output_len`, then `count ·
//!   output_len` int8 codes.
//! * trace: `b"INGT"`, then records `u32 image, u32 step, u32 name_len,
//!   name, u32 len, len int8 codes` until the end of the file.
//! * counts (emulated runners): `b"INGC"`, then 24-byte records `u32 tag,
//!   u32 image, u32 step, u32 0, u64 value` (see [`CountTag`]).
//!
//! Without a camera the runners read and write exactly what they did
//! before frames existed.

use super::{CheckError, Result};
use std::path::Path;

/// Magic of the inputs file.
pub const INPUTS_MAGIC: &[u8; 4] = b"INGI";
/// Magic of the frames file (camera runs).
pub const FRAMES_MAGIC: &[u8; 4] = b"INGF";
/// Magic of the outputs file.
pub const OUTPUTS_MAGIC: &[u8; 4] = b"INGO";
/// Magic of the trace file.
pub const TRACE_MAGIC: &[u8; 4] = b"INGT";
/// Magic of the counts file.
pub const COUNTS_MAGIC: &[u8; 4] = b"INGC";

fn bad(file: &str, detail: impl Into<String>) -> CheckError {
    CheckError::Format {
        file: file.to_string(),
        detail: detail.into(),
    }
}

/// `count` equal-length int8 vectors as one file (inputs or outputs).
pub fn encode_batch(magic: &[u8; 4], len: usize, items: &[Vec<i8>]) -> Result<Vec<u8>> {
    let mut out = Vec::with_capacity(12 + len * items.len());
    out.extend_from_slice(magic);
    out.extend_from_slice(&(items.len() as u32).to_le_bytes());
    out.extend_from_slice(&(len as u32).to_le_bytes());
    for (i, it) in items.iter().enumerate() {
        if it.len() != len {
            return Err(bad(
                "batch",
                format!("item {i} has {} values, expected {len}", it.len()),
            ));
        }
        out.extend(it.iter().map(|&v| v as u8));
    }
    Ok(out)
}

/// `count` raw camera frames of `frame_bytes` bytes each as one file.
pub fn encode_frames(frame_bytes: usize, frames: &[Vec<u8>]) -> Result<Vec<u8>> {
    let mut out = Vec::with_capacity(12 + frame_bytes * frames.len());
    out.extend_from_slice(FRAMES_MAGIC);
    out.extend_from_slice(&(frames.len() as u32).to_le_bytes());
    out.extend_from_slice(&(frame_bytes as u32).to_le_bytes());
    for (i, f) in frames.iter().enumerate() {
        if f.len() != frame_bytes {
            return Err(bad(
                "frames",
                format!("frame {i} has {} bytes, expected {frame_bytes}", f.len()),
            ));
        }
        out.extend_from_slice(f);
    }
    Ok(out)
}

/// Parses a file written by [`encode_batch`] (or by a runner).
pub fn decode_batch(magic: &[u8; 4], bytes: &[u8], file: &str) -> Result<(usize, Vec<Vec<i8>>)> {
    if bytes.len() < 12 || &bytes[..4] != magic {
        return Err(bad(file, "missing header"));
    }
    let count = u32::from_le_bytes(bytes[4..8].try_into().unwrap()) as usize;
    let len = u32::from_le_bytes(bytes[8..12].try_into().unwrap()) as usize;
    let body = &bytes[12..];
    let need = count
        .checked_mul(len)
        .ok_or_else(|| bad(file, "size overflow"))?;
    if body.len() != need {
        return Err(bad(
            file,
            format!(
                "{count} × {len} values announced, {} bytes present",
                body.len()
            ),
        ));
    }
    let items = if len == 0 {
        vec![Vec::new(); count]
    } else {
        body.chunks_exact(len)
            .map(|c| c.iter().map(|&b| b as i8).collect())
            .collect()
    };
    Ok((len, items))
}

/// Writes the inputs file.
pub fn write_inputs(path: &Path, input_len: usize, inputs: &[Vec<i8>]) -> Result<()> {
    let bytes = encode_batch(INPUTS_MAGIC, input_len, inputs)?;
    std::fs::write(path, bytes)
        .map_err(|e| CheckError::io(format!("writing {}", path.display()), e))
}

/// Reads an outputs file, checking the per-image length.
pub fn read_outputs(path: &Path, output_len: Option<usize>) -> Result<Vec<Vec<i8>>> {
    let bytes = std::fs::read(path)
        .map_err(|e| CheckError::io(format!("reading {}", path.display()), e))?;
    let (len, items) = decode_batch(OUTPUTS_MAGIC, &bytes, "outputs")?;
    if let Some(want) = output_len {
        if len != want {
            return Err(bad(
                "outputs",
                format!("output length {len}, expected {want}"),
            ));
        }
    }
    Ok(items)
}

/// One map reported by a module's trace hook.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TraceMap {
    /// Image index in the batch.
    pub image: usize,
    /// Step index as the module numbers it.
    pub step: usize,
    /// Step name.
    pub name: String,
    /// The step's output map (dense HWC int8 codes).
    pub data: Vec<i8>,
}

/// Serialises trace records (the format the runners write).
pub fn encode_trace(maps: &[TraceMap]) -> Vec<u8> {
    let mut out = TRACE_MAGIC.to_vec();
    for m in maps {
        out.extend_from_slice(&(m.image as u32).to_le_bytes());
        out.extend_from_slice(&(m.step as u32).to_le_bytes());
        out.extend_from_slice(&(m.name.len() as u32).to_le_bytes());
        out.extend_from_slice(m.name.as_bytes());
        out.extend_from_slice(&(m.data.len() as u32).to_le_bytes());
        out.extend(m.data.iter().map(|&v| v as u8));
    }
    out
}

/// Parses a trace file.
pub fn decode_trace(bytes: &[u8]) -> Result<Vec<TraceMap>> {
    if bytes.len() < 4 || &bytes[..4] != TRACE_MAGIC {
        return Err(bad("trace", "missing header"));
    }
    let mut pos = 4;
    let mut out = Vec::new();
    let take = |pos: &mut usize, n: usize| -> Result<&[u8]> {
        let end = pos
            .checked_add(n)
            .filter(|&e| e <= bytes.len())
            .ok_or_else(|| bad("trace", format!("truncated record at byte {pos}")))?;
        let s = &bytes[*pos..end];
        *pos = end;
        Ok(s)
    };
    let u32_at = |s: &[u8]| u32::from_le_bytes(s.try_into().unwrap()) as usize;
    while pos < bytes.len() {
        let image = u32_at(take(&mut pos, 4)?);
        let step = u32_at(take(&mut pos, 4)?);
        let name_len = u32_at(take(&mut pos, 4)?);
        let name = String::from_utf8_lossy(take(&mut pos, name_len)?).into_owned();
        let len = u32_at(take(&mut pos, 4)?);
        let data = take(&mut pos, len)?.iter().map(|&b| b as i8).collect();
        out.push(TraceMap {
            image,
            step,
            name,
            data,
        });
    }
    Ok(out)
}

/// Reads a trace file.
pub fn read_trace(path: &Path) -> Result<Vec<TraceMap>> {
    let bytes = std::fs::read(path)
        .map_err(|e| CheckError::io(format!("reading {}", path.display()), e))?;
    decode_trace(&bytes)
}

/// Kind of a counts record.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u32)]
pub enum CountTag {
    /// SysTick ticks of one `run` call (`value`), for `image`.
    Run = 1,
    /// Ticks of one step inside `run_traced` (`image`, `step`), the time
    /// spent in the trace hook excluded.
    Step = 2,
    /// Bytes of stack the runner used at most (painted-stack high-water
    /// mark), once at the end.
    Stack = 3,
    /// Ticks between two back-to-back timer reads, once at the start.
    TimerOverhead = 4,
    /// Ticks of one whole `run_traced` call, hook time excluded.
    TracedRun = 5,
    /// Ticks of one `frame_to_input` call (camera runs), for `image`.
    FrameToInput = 6,
}

/// One record of the counts file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct CountRecord {
    /// What it counts.
    pub tag: CountTag,
    /// Image index.
    pub image: usize,
    /// Step index (for [`CountTag::Step`]).
    pub step: usize,
    /// Ticks or bytes.
    pub value: u64,
}

/// Parses a counts file.
pub fn decode_counts(bytes: &[u8]) -> Result<Vec<CountRecord>> {
    if bytes.len() < 4 || &bytes[..4] != COUNTS_MAGIC {
        return Err(bad("counts", "missing header"));
    }
    let body = &bytes[4..];
    if body.len() % 24 != 0 {
        return Err(bad(
            "counts",
            format!("{} bytes is not whole records", body.len()),
        ));
    }
    body.chunks_exact(24)
        .map(|r| {
            let u = |a: usize| u32::from_le_bytes(r[a..a + 4].try_into().unwrap());
            let tag = match u(0) {
                1 => CountTag::Run,
                2 => CountTag::Step,
                3 => CountTag::Stack,
                4 => CountTag::TimerOverhead,
                5 => CountTag::TracedRun,
                6 => CountTag::FrameToInput,
                t => return Err(bad("counts", format!("unknown tag {t}"))),
            };
            Ok(CountRecord {
                tag,
                image: u(4) as usize,
                step: u(8) as usize,
                value: u64::from_le_bytes(r[16..24].try_into().unwrap()),
            })
        })
        .collect()
}

/// Serialises counts records (used by tests; the firmware writes the same
/// layout).
pub fn encode_counts(records: &[CountRecord]) -> Vec<u8> {
    let mut out = COUNTS_MAGIC.to_vec();
    for r in records {
        out.extend_from_slice(&(r.tag as u32).to_le_bytes());
        out.extend_from_slice(&(r.image as u32).to_le_bytes());
        out.extend_from_slice(&(r.step as u32).to_le_bytes());
        out.extend_from_slice(&0u32.to_le_bytes());
        out.extend_from_slice(&r.value.to_le_bytes());
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn batch_round_trips_and_rejects_wrong_lengths() {
        let items = vec![vec![1i8, -2, 3], vec![-128, 127, 0]];
        let bytes = encode_batch(OUTPUTS_MAGIC, 3, &items).unwrap();
        assert_eq!(bytes.len(), 12 + 6);
        let (len, back) = decode_batch(OUTPUTS_MAGIC, &bytes, "t").unwrap();
        assert_eq!((len, back), (3, items.clone()));
        assert!(decode_batch(INPUTS_MAGIC, &bytes, "t").is_err());
        assert!(decode_batch(OUTPUTS_MAGIC, &bytes[..bytes.len() - 1], "t").is_err());
        assert!(encode_batch(OUTPUTS_MAGIC, 2, &items).is_err());

        let frames = encode_frames(4, &[vec![1, 2, 3, 4], vec![5, 6, 7, 8]]).unwrap();
        assert_eq!(&frames[..4], FRAMES_MAGIC);
        assert_eq!(frames.len(), 12 + 8);
        assert_eq!(frames[8..12], 4u32.to_le_bytes());
        assert_eq!(frames[12..], [1, 2, 3, 4, 5, 6, 7, 8]);
        assert!(encode_frames(3, &[vec![1, 2, 3, 4]]).is_err());
    }

    #[test]
    fn trace_and_counts_round_trip_and_truncation_is_an_error() {
        let maps = vec![
            TraceMap {
                image: 0,
                step: 0,
                name: "conv1".into(),
                data: vec![1, 2, -3],
            },
            TraceMap {
                image: 1,
                step: 2,
                name: "fc".into(),
                data: vec![],
            },
        ];
        let bytes = encode_trace(&maps);
        assert_eq!(decode_trace(&bytes).unwrap(), maps);
        assert!(decode_trace(&bytes[..bytes.len() - 3]).is_err());

        let recs = vec![
            CountRecord {
                tag: CountTag::Run,
                image: 3,
                step: 0,
                value: 1 << 40,
            },
            CountRecord {
                tag: CountTag::Step,
                image: 3,
                step: 7,
                value: 12,
            },
            CountRecord {
                tag: CountTag::FrameToInput,
                image: 1,
                step: 0,
                value: 99,
            },
        ];
        let bytes = encode_counts(&recs);
        assert_eq!(decode_counts(&bytes).unwrap(), recs);
        let mut bad_tag = bytes.clone();
        bad_tag[4] = 99;
        assert!(decode_counts(&bad_tag).is_err());
    }
}
