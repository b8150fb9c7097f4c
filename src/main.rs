//! `ingot`: command-line front of the ingot compiler.

fn main() {
    eprintln!("ingot: no command yet");
    std::process::exit(2);
}
