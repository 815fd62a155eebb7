//! cargo-fuzz (libFuzzer) entry for [`outrider_fuzz::config`].
#![no_main]
libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    let _ = outrider_fuzz::config(data);
});
