//! Fuzz target: gradaudit::fuzzing::baseline must return for any input, never panic.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    gradaudit::fuzzing::baseline(data);
});
