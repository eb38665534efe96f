#![no_main]
libfuzzer_sys::fuzz_target!(|data: &[u8]| analyzer_core::fuzz_targets::value(data));
