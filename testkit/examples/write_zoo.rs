//! Writes a zoo network and a few seeded gray pictures for it, so that
//! `ingot check` can measure it on an emulated core:
//!
//! ```text
//! cargo run -p ingot-testkit --example write_zoo -- howard2017 DIR
//! ingot check DIR/howard2017.graph.json --calib-images DIR/images \
//!     --images DIR/images --on m4 --report DIR/report
//! ```
//!
//! `howard2017` is `depthwise_separable(&DepthwiseConfig::howard2017(0.25))`:
//! the layout of Howard et al. (2017) on a 96×96 gray input, deterministic
//! weights (fine for instruction counts, meaningless for accuracy).

use ingot_testkit::zoo::{depthwise_separable, DepthwiseConfig, Rng};
use std::path::PathBuf;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let (Some(name), Some(dir)) = (args.get(1), args.get(2)) else {
        eprintln!("usage: write_zoo howard2017 DIR");
        std::process::exit(2);
    };
    let net = match name.as_str() {
        "howard2017" => depthwise_separable(&DepthwiseConfig::howard2017(0.25), 1),
        other => {
            eprintln!("unknown network {other} (known: howard2017)");
            std::process::exit(2);
        }
    };
    let dir = PathBuf::from(dir);
    let images = dir.join("images");
    std::fs::create_dir_all(&images).expect("create the folder");
    let graph = net.write(&dir, name).expect("write the network");
    // Gray PGM pictures of the input size, seeded noise over a gradient.
    let mut rng = Rng::new(7);
    for k in 0..4 {
        let (w, h) = (96usize, 96usize);
        let mut pgm = format!("P5\n{w} {h}\n255\n").into_bytes();
        for y in 0..h {
            for x in 0..w {
                let v = (x + y + 40 * k) as f32 + 60.0 * rng.uniform();
                pgm.push(v.min(255.0) as u8);
            }
        }
        std::fs::write(images.join(format!("img{k}.pgm")), pgm).expect("write a picture");
    }
    println!("{}", graph.display());
}
