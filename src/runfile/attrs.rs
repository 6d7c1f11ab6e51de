//! Typed reading of root attributes, with messages that say what was found instead.

use hdf5::types::{FixedAscii, FixedUnicode, TypeDescriptor, VarLenAscii, VarLenUnicode};

/// Longest fixed-length string attribute read, in bytes (a fixed-length string is read into a
/// buffer of this size; the writer stores no longer ones).
pub const MAX_FIXED_STRING_BYTES: usize = 4096;

/// A short name of a stored type, for messages.
pub fn type_name(t: &TypeDescriptor) -> String {
    match t {
        TypeDescriptor::Integer(s) => format!("{}-bit signed integer", *s as usize * 8),
        TypeDescriptor::Unsigned(s) => format!("{}-bit unsigned integer", *s as usize * 8),
        TypeDescriptor::Float(s) => format!("{}-bit float", *s as usize * 8),
        TypeDescriptor::Boolean => "boolean".into(),
        TypeDescriptor::VarLenAscii | TypeDescriptor::VarLenUnicode | TypeDescriptor::FixedAscii(_) | TypeDescriptor::FixedUnicode(_) => "string".into(),
        TypeDescriptor::Compound(_) => "compound".into(),
        TypeDescriptor::Enum(_) => "enum".into(),
        _ => "non-numeric type".into(),
    }
}

/// Whether values of this type convert to f64 without loss of meaning.
pub fn is_number(t: &TypeDescriptor) -> bool {
    matches!(t, TypeDescriptor::Integer(_) | TypeDescriptor::Unsigned(_) | TypeDescriptor::Float(_))
}

fn scalar_attr(file: &hdf5::File, name: &str) -> Result<(hdf5::Attribute, TypeDescriptor), String> {
    let attr = file.attr(name).map_err(|_| "attribute is missing".to_string())?;
    let shape = attr.shape();
    if !(shape.is_empty() || shape == [1]) {
        return Err(format!("attribute has shape {shape:?}, expected a single value"));
    }
    let t = attr.dtype().and_then(|d| d.to_descriptor()).map_err(|e| format!("attribute type cannot be read: {e}"))?;
    Ok((attr, t))
}

/// Reads a numeric scalar attribute as f64.
pub fn read_f64(file: &hdf5::File, name: &str) -> Result<f64, String> {
    let (attr, t) = scalar_attr(file, name)?;
    if !is_number(&t) {
        return Err(format!("attribute is a {}, expected a number", type_name(&t)));
    }
    let v = if attr.shape().is_empty() { attr.read_scalar::<f64>() } else { attr.read_raw::<f64>().map(|v| v[0]) };
    v.map_err(|e| format!("cannot be read as a number: {e}"))
}

/// Reads an optional numeric attribute holding a list (1-D, at most `max_len` values; a
/// scalar is a list of one) as f64. `None` when the attribute is absent.
pub fn read_optional_f64_list(file: &hdf5::File, name: &str, max_len: usize) -> Result<Option<Vec<f64>>, String> {
    let attr = match file.attr(name) {
        Ok(a) => a,
        Err(e) if e.contains_minor(hdf5::MinorErrorCode::NotFound) => return Ok(None),
        Err(e) => return Err(format!("attribute cannot be read (corrupted file?): {e}")),
    };
    let shape = attr.shape();
    if shape.len() > 1 || shape.first().is_some_and(|&n| n > max_len) {
        return Err(format!("attribute has shape {shape:?}, expected a list of at most {max_len} values"));
    }
    let t = attr.dtype().and_then(|d| d.to_descriptor()).map_err(|e| format!("attribute type cannot be read: {e}"))?;
    if !is_number(&t) {
        return Err(format!("attribute is a {}, expected numbers", type_name(&t)));
    }
    let values = if shape.is_empty() { attr.read_scalar::<f64>().map(|v| vec![v]) } else { attr.read_raw::<f64>() };
    values.map(Some).map_err(|e| format!("cannot be read as numbers: {e}"))
}

/// Reads a scalar string attribute, variable-length or fixed-length, ASCII or UTF-8 (writers
/// differ). Bytes that are not UTF-8 are replaced by U+FFFD, so a foreign or damaged label
/// never makes an invalid `String`.
pub fn read_string(file: &hdf5::File, name: &str) -> Result<String, String> {
    // An object header that fails its checksum (1.10 format) is a damaged file, not a missing
    // attribute; `format` is read first, so this is where a damaged root header shows.
    if let Err(e) = file.attr(name)
        && !e.contains_minor(hdf5::MinorErrorCode::NotFound)
    {
        return Err(format!("attribute cannot be read (corrupted file?): {e}"));
    }
    let (attr, t) = scalar_attr(file, name)?;
    if !attr.shape().is_empty() {
        return Err("attribute is an array, expected a single string".into());
    }
    let text = |bytes: &[u8]| String::from_utf8_lossy(bytes).into_owned();
    match t {
        TypeDescriptor::VarLenUnicode => attr.read_scalar::<VarLenUnicode>().map(|s| text(s.as_bytes())),
        TypeDescriptor::VarLenAscii => attr.read_scalar::<VarLenAscii>().map(|s| text(s.as_bytes())),
        TypeDescriptor::FixedUnicode(n) | TypeDescriptor::FixedAscii(n) if n > MAX_FIXED_STRING_BYTES => {
            return Err(format!("attribute is a fixed-length string of {n} bytes, longer than the {MAX_FIXED_STRING_BYTES} accepted"));
        }
        // The library converts the stored length and padding (null-terminated, null- or
        // space-padded) to a null-padded buffer of the largest accepted size.
        TypeDescriptor::FixedUnicode(_) => attr.read_scalar::<FixedUnicode<MAX_FIXED_STRING_BYTES>>().map(|s| text(s.as_bytes())),
        TypeDescriptor::FixedAscii(_) => attr.read_scalar::<FixedAscii<MAX_FIXED_STRING_BYTES>>().map(|s| text(s.as_bytes())),
        other => return Err(format!("attribute is a {}, expected a variable-length string", type_name(&other))),
    }
    .map_err(|e| format!("cannot be read as a string: {e}"))
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::str::FromStr;

    fn file_with(name: &str, write: impl FnOnce(&hdf5::File) -> hdf5::Result<()>) -> (tempfile::TempDir, hdf5::File) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join(name);
        let file = hdf5::File::create(&path).unwrap();
        write(&file).unwrap();
        file.close().unwrap();
        let file = hdf5::File::open(&path).unwrap();
        (dir, file)
    }

    #[test]
    fn reads_variable_and_fixed_length_strings() {
        let (_dir, file) = file_with("kinds.h5", |f| {
            f.new_attr::<VarLenUnicode>().create("vu")?.write_scalar(&VarLenUnicode::from_str("night 3 µ").unwrap())?;
            f.new_attr::<VarLenAscii>().create("va")?.write_scalar(&VarLenAscii::from_ascii("axsift-run").unwrap())?;
            // Exactly as long as the text: no terminating NUL is stored.
            f.new_attr::<FixedAscii<10>>().create("fa")?.write_scalar(&FixedAscii::<10>::from_ascii("axsift-run").unwrap())?;
            f.new_attr::<FixedUnicode<32>>().create("fu")?.write_scalar(&FixedUnicode::<32>::from_str("cooldown ½").unwrap())?;
            f.new_attr::<FixedAscii<1>>().create("empty")?.write_scalar(&FixedAscii::<1>::new())
        });
        assert_eq!(read_string(&file, "vu").unwrap(), "night 3 µ");
        assert_eq!(read_string(&file, "va").unwrap(), "axsift-run");
        assert_eq!(read_string(&file, "fa").unwrap(), "axsift-run");
        assert_eq!(read_string(&file, "fu").unwrap(), "cooldown ½");
        assert_eq!(read_string(&file, "empty").unwrap(), "");
    }

    #[test]
    fn refuses_non_strings_arrays_and_oversized_fixed_strings() {
        let (_dir, file) = file_with("bad.h5", |f| {
            f.new_attr::<f64>().create("number")?.write_scalar(&1.5)?;
            f.new_attr_builder().with_data(&[FixedAscii::<4>::from_ascii("ab").unwrap()]).create("one")?;
            let words: Vec<FixedAscii<4>> = ["ab", "cd"].iter().map(|w| FixedAscii::from_ascii(w).unwrap()).collect();
            f.new_attr_builder().with_data(&words).create("two")?;
            f.new_attr_builder().empty_as(TypeDescriptor::FixedAscii(MAX_FIXED_STRING_BYTES + 1)).create("long").map(|_| ())
        });
        assert_eq!(read_string(&file, "number").unwrap_err(), "attribute is a 64-bit float, expected a variable-length string");
        assert_eq!(read_string(&file, "one").unwrap_err(), "attribute is an array, expected a single string");
        assert_eq!(read_string(&file, "two").unwrap_err(), "attribute has shape [2], expected a single value");
        let long = read_string(&file, "long").unwrap_err();
        assert!(long.contains("4097 bytes") && long.contains("4096 accepted"), "{long}");
        assert_eq!(read_string(&file, "absent").unwrap_err(), "attribute is missing");
    }

    #[test]
    fn damaged_header_is_not_called_a_missing_attribute() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("damaged.h5");
        let file = hdf5::File::with_options().with_fapl(|p| p.libver_v110()).create(&path).unwrap();
        file.new_attr::<FixedAscii<10>>().create("format").unwrap().write_scalar(&FixedAscii::<10>::from_ascii("axsift-run").unwrap()).unwrap();
        file.close().unwrap();
        let mut bytes = std::fs::read(&path).unwrap();
        // A byte inside the root object header (after its "OHDR" signature), which carries a checksum.
        let header = bytes.windows(4).position(|w| w == b"OHDR").unwrap();
        bytes[header + 12] ^= 0x5a;
        std::fs::write(&path, &bytes).unwrap();
        let file = hdf5::File::open(&path).unwrap();
        let e = read_string(&file, "format").unwrap_err();
        assert!(e.starts_with("attribute cannot be read (corrupted file?): ") && e.contains("checksum"), "{e}");
    }

    #[test]
    fn bytes_that_are_not_utf8_are_replaced() {
        let (_dir, file) = file_with("latin1.h5", |f| {
            // 0xE9 is a Latin-1 "é": stored by some writers in a string declared ASCII.
            let raw = unsafe { FixedAscii::<8>::from_ascii_unchecked(b"caf\xe9") };
            f.new_attr::<FixedAscii<8>>().create("label")?.write_scalar(&raw)
        });
        assert_eq!(read_string(&file, "label").unwrap(), "caf\u{fffd}");
    }
}
