//! Fuzz target: gradaudit::fuzzing::policy must return for any input, never panic.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    gradaudit::fuzzing::policy(data);
});
