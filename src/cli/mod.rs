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

/// Exit status for an error: 2 for bad input (files, arguments, data), 1 for anything else.
pub fn exit_status(e: &anyhow::Error) -> u8 {
    let system = e.downcast_ref::<std::io::Error>().is_some() || e.downcast_ref::<crate::serve::ServeError>().is_some_and(crate::serve::ServeError::is_system);
    if system { 1 } else { 2 }
}
