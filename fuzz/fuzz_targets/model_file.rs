//! Model-file reader: any bytes → an error or a valid model that scores a row.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    kernelpress::limits::set_max_memory(1 << 30);
    if let Ok(f) = kernelpress::format::TensorFile::from_bytes(data, "fuzz") {
        if let Ok(m) = kernelpress::model::AnyModel::from_file(&f, "fuzz") {
            let d = m.input_dim();
            if d <= 4096 {
                let x = ndarray::Array2::<f64>::zeros((1, d));
                let _ = m.decision(x.view());
            }
        }
    }
});
