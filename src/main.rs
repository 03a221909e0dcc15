//! The `cohortmix` command: parse the command line, run, map the outcome to an exit status.

fn main() {
    std::process::exit(cohortmix::cli::main());
}
