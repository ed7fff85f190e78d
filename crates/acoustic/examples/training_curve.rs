//! Draws the training curve of a training log, as `isogloss train` does after every epoch:
//! `cargo run --release -p isogloss-acoustic --example training_curve -- LOG.jsonl NAME OUT.svg`
//! (used for the README's preview of the shipped model's curve).

use std::path::PathBuf;

use isogloss_acoustic::log::{read_epochs, training_curve};

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let [log, name, out] = args.as_slice() else {
        eprintln!("usage: training_curve LOG.jsonl NAME OUT.svg");
        std::process::exit(1);
    };
    let written = match read_epochs(&PathBuf::from(log)) {
        Ok(epochs) => isogloss_acoustic::io::write_atomically(
            &PathBuf::from(out),
            training_curve(name, &epochs).as_bytes(),
        ),
        Err(error) => Err(error),
    };
    if let Err(error) = written {
        eprintln!("error: {error}");
        std::process::exit(1);
    }
}
