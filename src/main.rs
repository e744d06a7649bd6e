//! The `kiln` command line: reads files, calls the library, prints. It holds no statistics.

use kiln::error::KilnError;
use kiln::pipeline;
use kiln::report;
use std::process::ExitCode;

const USAGE: &str = "\
kiln: modes, log evidence (log Z) and cross-checks for multimodal densities

Usage:
  kiln check SPEC.json [--json]   find the modes, the Laplace log Z and the grid log Z (1-2 unknowns)
  kiln --help                     this text
  kiln --version                  the version

Exit codes: 0 success, 2 bad input (the message on standard error says where and how to fix it).";

fn read_spec(path: &str) -> Result<kiln::Spec, KilnError> {
    let text = std::fs::read_to_string(path).map_err(|e| {
        KilnError::usage(format!("cannot read `{path}`: {e}"))
            .with_hint("check the path and that the file is UTF-8 text")
    })?;
    kiln::parse_spec(path, &text)
}

fn to_json<T: serde::Serialize>(v: &T) -> Result<String, KilnError> {
    serde_json::to_string_pretty(v)
        .map_err(|e| KilnError::usage(format!("could not write JSON: {e}")))
}

fn run(args: &[String]) -> Result<String, KilnError> {
    let Some(cmd) = args.first() else {
        return Err(KilnError::usage("no command given")
            .with_hint("try `kiln check SPEC.json`; `kiln --help` lists the commands"));
    };
    match cmd.as_str() {
        "-h" | "--help" | "help" => Ok(USAGE.to_string()),
        "-V" | "--version" => Ok(format!("kiln {}", env!("CARGO_PKG_VERSION"))),
        "check" => {
            let mut json = false;
            let mut files = Vec::new();
            for a in &args[1..] {
                match a.as_str() {
                    "--json" => json = true,
                    s if s.starts_with('-') => {
                        return Err(KilnError::usage(format!(
                            "unknown option `{s}` for `kiln check`"
                        ))
                        .with_hint("the only option is --json"))
                    }
                    s => files.push(s.to_string()),
                }
            }
            if files.len() != 1 {
                return Err(KilnError::usage("`kiln check` takes exactly one spec file")
                    .with_hint("kiln check SPEC.json [--json]"));
            }
            let spec = read_spec(&files[0])?;
            let outcome = pipeline::check(&spec)?;
            if json {
                to_json(&outcome)
            } else {
                Ok(report::check_text(&outcome))
            }
        }
        other => {
            let known = ["check"];
            let hint = match kiln::error::nearest(other, known) {
                Some(k) => format!("did you mean `kiln {k}`?"),
                None => "`kiln --help` lists the commands".to_string(),
            };
            Err(KilnError::usage(format!("unknown command `{other}`")).with_hint(hint))
        }
    }
}

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match run(&args) {
        Ok(out) => {
            println!("{}", out.trim_end());
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprint!("{}", e.render());
            ExitCode::from(2)
        }
    }
}
