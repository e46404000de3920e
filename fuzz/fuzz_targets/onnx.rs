//! ONNX SVM reader: any bytes → an error or a valid exact model.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(m) = kernelpress::export::onnx::svm::import_svm_bytes(data, "fuzz") {
        let x = ndarray::Array2::<f64>::zeros((1, m.input_dim()));
        let _ = m.decision(x.view());
    }
});
