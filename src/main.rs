fn main() {
    std::process::exit(kernelpress::cli::main());
}
