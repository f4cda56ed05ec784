//! Writing a package: a safetensors file whose header is laid out deterministically (metadata
//! keys sorted, tensors in name order, data in the same order, header padded with spaces to a
//! multiple of 8 bytes so that every tensor is 4-byte aligned). The same package therefore always
//! gives the same bytes, and so the same content version, whichever process writes it.

use std::collections::BTreeMap;
use std::fmt::Write as _;

/// One tensor to write: name, shape and f32 values in row-major order.
pub(super) struct NamedTensor {
    pub name: String,
    pub shape: Vec<usize>,
    pub values: Vec<f32>,
}

/// Serialises `tensors` (sorted by name here) with the string `metadata`.
pub(super) fn serialize(
    metadata: &BTreeMap<String, String>,
    mut tensors: Vec<NamedTensor>,
) -> Vec<u8> {
    tensors.sort_by(|a, b| a.name.cmp(&b.name));
    let json = |s: &str| serde_json::to_string(s).expect("strings serialise");
    let mut header = String::from("{\"__metadata__\":{");
    for (i, (k, v)) in metadata.iter().enumerate() {
        if i > 0 {
            header.push(',');
        }
        let _ = write!(header, "{}:{}", json(k), json(v));
    }
    header.push('}');
    let mut offset = 0usize;
    for t in &tensors {
        let len = t.values.len() * 4;
        let dims: Vec<String> = t.shape.iter().map(|d| d.to_string()).collect();
        let _ = write!(
            header,
            ",{}:{{\"dtype\":\"F32\",\"shape\":[{}],\"data_offsets\":[{},{}]}}",
            json(&t.name),
            dims.join(","),
            offset,
            offset + len
        );
        offset += len;
    }
    header.push('}');
    while (8 + header.len()) % 8 != 0 {
        header.push(' ');
    }
    let mut out = Vec::with_capacity(8 + header.len() + offset);
    out.extend_from_slice(&(header.len() as u64).to_le_bytes());
    out.extend_from_slice(header.as_bytes());
    for t in &tensors {
        out.extend_from_slice(bytemuck::cast_slice(&t.values));
    }
    if cfg!(target_endian = "big") {
        // safetensors is little-endian; cast_slice above wrote native order.
        let data = &mut out[8 + header.len()..];
        for c in data.chunks_exact_mut(4) {
            c.reverse();
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn output_is_valid_safetensors_and_aligned() {
        let mut md = BTreeMap::new();
        md.insert("b".to_owned(), "2".to_owned());
        md.insert("a".to_owned(), "quote \" here".to_owned());
        let t = |name: &str, n: usize| NamedTensor {
            name: name.to_owned(),
            shape: vec![n],
            values: (0..n).map(|i| i as f32).collect(),
        };
        let bytes = serialize(&md, vec![t("z", 3), t("y", 5)]);
        let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
        assert_eq!(st.tensor("z").unwrap().shape(), [3]);
        let (n, meta) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
        assert_eq!((8 + n) % 8, 0);
        assert_eq!(
            meta.metadata().as_ref().unwrap()["a"],
            "quote \" here".to_owned()
        );
        // Same input in another order: same bytes.
        let again = serialize(&md, vec![t("y", 5), t("z", 3)]);
        assert_eq!(bytes, again);
    }
}
