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
//! the layout of Howard et al. (2017) on a 96×96 gray input; `sandler2018`
//! is `inverted_residual(&InvertedResidualConfig::sandler2018(0.35))`: the
//! layout of Sandler et al. (2018) on the same input. Both have
//! deterministic weights (fine for instruction counts, meaningless for
//! accuracy).

use ingot_testkit::zoo::{
    depthwise_separable, inverted_residual, write_gray_pictures, DepthwiseConfig,
    InvertedResidualConfig,
};
use std::path::PathBuf;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let (Some(name), Some(dir)) = (args.get(1), args.get(2)) else {
        eprintln!("usage: write_zoo howard2017|sandler2018 DIR");
        std::process::exit(2);
    };
    let net = match name.as_str() {
        "howard2017" => depthwise_separable(&DepthwiseConfig::howard2017(0.25), 1),
        "sandler2018" => inverted_residual(&InvertedResidualConfig::sandler2018(0.35), 1),
        other => {
            eprintln!("unknown network {other} (known: howard2017, sandler2018)");
            std::process::exit(2);
        }
    };
    let dir = PathBuf::from(dir);
    std::fs::create_dir_all(&dir).expect("create the folder");
    let graph = net.write(&dir, name).expect("write the network");
    // Gray pictures of the input size, seeded noise over a gradient.
    write_gray_pictures(&dir.join("images"), 96, 96, 4, 7).expect("write the pictures");
    println!("{}", graph.display());
}
