//! Command-line interface: argument types (clap, `args`) and the `run` entry point the binary
//! calls, which hands each command to its file: `synth` (synthetic sequences, the sun table),
//! `replay` (replay and batches, merge, demo, evaluate), `frames` (segment, qc), `calibrate` (calibrate, camera),
//! `bench`, `live` (live mode, the Modbus register map).

mod args;
mod bench;
mod calibrate;
mod frames;
mod live;
mod replay;
mod synth;

pub use args::*;
pub use frames::ImpossibleValues;
pub use replay::print_replay_summary;

use anyhow::Result;

/// Run a parsed command line: check the arguments, then hand them to the command's function.
///
/// # Errors
/// Any failure, with context naming the file or argument.
pub fn run(cli: Cli) -> Result<()> {
    check_args(&cli)?;
    match cli.command {
        Command::Sun(a) => synth::cmd_sun(a),
        Command::Synth(a) => synth::cmd_synth(a),
        Command::Replay(a) => replay::cmd_replay(a),
        Command::Demo(a) => replay::cmd_demo(a),
        Command::Segment(a) => frames::cmd_segment(a),
        Command::Calibrate(a) => calibrate::cmd_calibrate(a),
        Command::Qc(a) => frames::cmd_qc(a),
        Command::Live(a) => live::cmd_live(a),
        Command::Registers(a) => live::cmd_registers(a),
        Command::Camera(c) => calibrate::cmd_camera(c),
        Command::Bench(a) => bench::cmd_bench(a),
        Command::Evaluate(a) => replay::cmd_evaluate(a),
        Command::Merge(a) => replay::cmd_merge(a),
    }
}

/// Exit status for an error: 2 for bad input (files, arguments, data), 3 for `qc
/// --fail-on-impossible` finding impossible values, 1 for anything else.
pub fn exit_status(e: &anyhow::Error) -> u8 {
    if e.downcast_ref::<ImpossibleValues>().is_some() {
        return ImpossibleValues::EXIT_STATUS;
    }
    let system = e.downcast_ref::<std::io::Error>().is_some() || e.downcast_ref::<crate::serve::ServeError>().is_some_and(crate::serve::ServeError::is_system);
    if system { 1 } else { 2 }
}

/// The one-line message for an error and its causes, each cause once: a cause whose text is
/// already in the message (an error whose own text includes its source's) is not repeated.
pub fn error_message(e: &anyhow::Error) -> String {
    let mut msg = String::new();
    for cause in e.chain() {
        let text = cause.to_string();
        if msg.is_empty() {
            msg = text;
        } else if !text.is_empty() && !msg.contains(&text) {
            msg.push_str(": ");
            msg.push_str(&text);
        }
    }
    msg
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, thiserror::Error)]
    #[error("{file}: cannot read: {source}")]
    struct Outer {
        file: String,
        source: std::io::Error,
    }

    #[test]
    fn each_cause_is_printed_once() {
        let io = std::io::Error::new(std::io::ErrorKind::NotFound, "gone");
        let e = anyhow::Error::from(Outer { file: "/x".into(), source: io });
        assert_eq!(error_message(&e), "/x: cannot read: gone");
        let e = e.context("replay");
        assert_eq!(error_message(&e), "replay: /x: cannot read: gone");
        let plain = anyhow::anyhow!(std::io::Error::other("inner")).context("outer");
        assert_eq!(error_message(&plain), "outer: inner");
    }
}
