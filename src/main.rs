fn main() -> std::process::ExitCode {
    apportion::cli::main(apportion::shutdown::terminated())
}
