//! `.npy` reader: any bytes → an error or an array whose size matches its shape.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(a) = kernelpress::data::parse_npy(data, "fuzz") {
        let _ = a.into_2d("fuzz");
    }
});
