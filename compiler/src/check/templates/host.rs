//! ingot check runner for the host (generated; do not edit).
//!
//! Usage: runner INPUTS OUTPUTS [TRACE]
//!
//! With the `ingot-camera` feature INPUTS holds raw camera frames: each goes
//! through the module's `frame_to_input`, and the codes it made are written
//! to `codes.bin` in the working directory.
#[allow(dead_code, unused_imports, clippy::all)]
mod model {
    include!("@MODULE@.rs");
}

use std::io::Write;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if args.len() < 3 {
        eprintln!("usage: runner INPUTS OUTPUTS [TRACE]");
        std::process::exit(2);
    }
    let bytes = std::fs::read(&args[1]).expect("read inputs");
    #[cfg(not(feature = "ingot-camera"))]
    let (magic, item_len) = (b"INGI", model::INPUT_LEN);
    #[cfg(feature = "ingot-camera")]
    let (magic, item_len) = (b"INGF", model::FRAME_BYTES);
    assert!(bytes.len() >= 12 && &bytes[0..4] == magic, "inputs file has the wrong header");
    let count = u32::from_le_bytes(bytes[4..8].try_into().unwrap()) as usize;
    let len = u32::from_le_bytes(bytes[8..12].try_into().unwrap()) as usize;
    assert_eq!(len, item_len, "inputs file has the wrong input length");
    assert_eq!(bytes.len(), 12 + count * len, "inputs file is truncated");

    let mut out = Vec::with_capacity(12 + count * model::OUTPUT_LEN);
    out.extend_from_slice(b"INGO");
    out.extend_from_slice(&(count as u32).to_le_bytes());
    out.extend_from_slice(&(model::OUTPUT_LEN as u32).to_le_bytes());
    let mut trace = args.get(3).map(|_| b"INGT".to_vec());

    let mut scratch = Box::new(model::Scratch::new());
    let mut input = [0i8; model::INPUT_LEN];
    let mut output = [0i8; model::OUTPUT_LEN];
    let mut output2 = [0i8; model::OUTPUT_LEN];
    #[cfg(feature = "ingot-camera")]
    let mut codes = {
        let mut c = b"INGI".to_vec();
        c.extend_from_slice(&(count as u32).to_le_bytes());
        c.extend_from_slice(&(model::INPUT_LEN as u32).to_le_bytes());
        c
    };
    for image in 0..count {
        let src = &bytes[12 + image * len..12 + (image + 1) * len];
        #[cfg(not(feature = "ingot-camera"))]
        for (d, &s) in input.iter_mut().zip(src) {
            *d = s as i8;
        }
        #[cfg(feature = "ingot-camera")]
        {
            let frame: &[u8; model::FRAME_BYTES] = src.try_into().unwrap();
            model::frame_to_input(frame, &mut input);
            codes.extend(input.iter().map(|&v| v as u8));
        }
        model::run(&mut scratch, &input, &mut output);
        out.extend(output.iter().map(|&v| v as u8));
        if let Some(t) = trace.as_mut() {
            model::run_traced(&mut scratch, &input, &mut output2, &mut |step: usize, name: &str, map: &[i8]| {
                t.extend_from_slice(&(image as u32).to_le_bytes());
                t.extend_from_slice(&(step as u32).to_le_bytes());
                t.extend_from_slice(&(name.len() as u32).to_le_bytes());
                t.extend_from_slice(name.as_bytes());
                t.extend_from_slice(&(map.len() as u32).to_le_bytes());
                t.extend(map.iter().map(|&v| v as u8));
            });
            if output2 != output {
                eprintln!("ingot-runner: run_traced and run disagree on image {image}");
                std::process::exit(3);
            }
        }
    }
    std::fs::File::create(&args[2]).and_then(|mut f| f.write_all(&out)).expect("write outputs");
    #[cfg(feature = "ingot-camera")]
    std::fs::write("codes.bin", codes).expect("write codes");
    if let (Some(path), Some(t)) = (args.get(3), trace) {
        std::fs::write(path, t).expect("write trace");
    }
}
