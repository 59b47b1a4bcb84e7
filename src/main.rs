//! The `weighbridge` command: parses arguments and hands over to `weighbridge::cli`.
//! Exit codes: 0 success, 2 bad usage or input, 1 internal failure.

fn main() -> std::process::ExitCode {
    weighbridge::cli::main_entry()
}
