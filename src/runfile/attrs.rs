//! Typed reading of root attributes, with messages that say what was found instead.

use hdf5::types::{TypeDescriptor, VarLenAscii, VarLenUnicode};

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

/// Reads a variable-length string scalar attribute.
pub fn read_string(file: &hdf5::File, name: &str) -> Result<String, String> {
    let (attr, t) = scalar_attr(file, name)?;
    if !attr.shape().is_empty() {
        return Err("attribute is an array, expected a single string".into());
    }
    match t {
        TypeDescriptor::VarLenUnicode => attr.read_scalar::<VarLenUnicode>().map(|s| s.as_str().to_string()),
        TypeDescriptor::VarLenAscii => attr.read_scalar::<VarLenAscii>().map(|s| s.as_str().to_string()),
        other => return Err(format!("attribute is a {}, expected a variable-length string", type_name(&other))),
    }
    .map_err(|e| format!("cannot be read as a string: {e}"))
}
