//! Fuzz target for the product calibration file
//! (`fringe_quality::product_file::ProductFile::parse`, what `load` runs on
//! the file's text).
//!
//! Beyond "never panics": a file it accepts is written again by `to_text`
//! (what `save` writes) into a text that parses to the same file and the
//! same wire calibration (same content id).
#![no_main]

use std::path::Path;

use fringe_quality::product_file::ProductFile;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let path = Path::new("fuzz/PRODUCT.toml");
    let Ok((file, wire)) = ProductFile::parse(path, text) else {
        return;
    };
    assert_eq!(file.cal_id(), wire.content_id().to_string());
    let again = file.to_text().expect("an accepted file can be written");
    let (file2, wire2) = ProductFile::parse(path, &again).expect("a written file reads back");
    assert_eq!(wire2.content_id(), wire.content_id(), "same calibration");
    assert_eq!(file2.to_text().expect("writes"), again, "writing is stable");
});
