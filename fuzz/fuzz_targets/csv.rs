//! CSV reader: any text → an error or a table of finite numbers.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(s) = std::str::from_utf8(data) {
        for target in [None, Some("y")] {
            if let Ok(t) = kernelpress::data::read_csv_str(s, "fuzz", target) {
                assert!(t.x.iter().all(|v| v.is_finite()));
                assert_eq!(t.columns.len(), t.x.ncols());
            }
        }
    }
});
