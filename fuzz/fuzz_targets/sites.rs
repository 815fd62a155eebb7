//! cargo-fuzz (libFuzzer) entry for [`outrider_fuzz::sites`].
#![no_main]
libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    let _ = outrider_fuzz::sites(data);
});
