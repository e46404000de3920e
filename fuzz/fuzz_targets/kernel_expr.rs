//! Kernel expression parser: any text → an error or a kernel that prints and parses back.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(s) = std::str::from_utf8(data) {
        if let Ok(k) = s.parse::<kernelpress::kernel::Kernel>() {
            let back: kernelpress::kernel::Kernel = k.to_string().parse().expect("printed kernels parse");
            assert_eq!(back.to_string(), k.to_string());
            if k.check_dim(2).is_ok() {
                let _ = k.eval(&[0.5, -1.0], &[1.0, 2.0]);
            }
        }
    }
});
