//! `ductline`: the desktop app (no arguments, or `open PATH`) and the batch command line.

mod app;
mod cli;

use clap::Parser;
use cli::{Cli, Cmd};
use std::process::ExitCode;

fn main() -> ExitCode {
    let args = Cli::parse();
    let res = match args.cmd {
        None => app::run(None),
        Some(Cmd::Open { path }) => app::run(Some(path)),
        Some(Cmd::Inspect { stack, voxel_um, bin, crop }) => cli::inspect(&stack, voxel_um, bin, crop),
        Some(Cmd::Phantom(a)) => cli::make_phantom(a),
        Some(Cmd::Measure(a)) => cli::measure(a),
        Some(Cmd::Trace { stack, seeds, out, step_deg, voxel_um }) => cli::trace(&stack, &seeds, &out, step_deg, voxel_um),
        Some(Cmd::Batch { list, out_dir, step_mm, species }) => cli::batch(&list, &out_dir, step_mm, species),
    };
    match res {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            let msg = format!("{e:#}").replace('\n', " ");
            eprintln!("error: {msg}");
            ExitCode::FAILURE
        }
    }
}
