//! cargo-fuzz (libFuzzer) entry for [`outrider_fuzz::geojson`].
#![no_main]
libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    let _ = outrider_fuzz::geojson(data);
});
