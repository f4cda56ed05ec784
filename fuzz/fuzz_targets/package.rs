//! The adapter package reader (`AdapterPackage::from_bytes`, the code an upload and `adapter
//! inspect` run), fed arbitrary bytes. Seeds: two reference fixture packages and a small
//! classify package (`fuzz/seeds/package`).
//!
//! Properties, beyond "no panic, no overflow, no unbounded allocation":
//! - a refusal names the file it refused;
//! - a package the reader accepts is valid safetensors to the `safetensors` crate (an
//!   implementation outside this project), with the same tensors, shapes, data and metadata, and
//!   no tensor is dropped on the way (every tensor in the file is one the package holds);
//! - it round-trips through the writer: the written bytes read back to the same metadata,
//!   factors and head, bit for bit, and writing those again gives the same bytes, so the same
//!   content version;
//! - if it validates against the tiny reference decoder (`tests/reference/fixtures/tiny-llama`),
//!   every factor has the base matrix's shape and it loads as a resident adapter.
#![no_main]

use std::collections::BTreeMap;
use std::path::Path;
use std::sync::OnceLock;

use candle_core::Tensor;
use libfuzzer_sys::fuzz_target;
use switchyard_adapters::package::{Limits, content_version};
use switchyard_adapters::site::Factor;
use switchyard_adapters::{Adapter, AdapterPackage, BaseSpec, PackageBytes};

use switchyard_fuzz as _;

const FILE: &str = "fuzz-input.safetensors";

fn base() -> &'static BaseSpec {
    static BASE: OnceLock<BaseSpec> = OnceLock::new();
    BASE.get_or_init(|| {
        let dir =
            Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/reference/fixtures/tiny-llama");
        switchyard_server::model::generator::Generator::load(&dir)
            .expect("the tiny reference decoder loads")
            .spec()
            .clone()
    })
}

fn values(t: &Tensor) -> Vec<u32> {
    t.flatten_all()
        .and_then(|f| f.to_vec1::<f32>())
        .expect("package tensors are f32")
        .into_iter()
        .map(f32::to_bits)
        .collect()
}

/// Every tensor of a package under the name the writer gives it.
fn tensors(pkg: &AdapterPackage) -> BTreeMap<String, (Vec<usize>, Vec<u32>)> {
    let mut out = BTreeMap::new();
    for (site, (a, b)) in &pkg.factors {
        out.insert(site.tensor_name(Factor::A), (a.dims().to_vec(), values(a)));
        out.insert(site.tensor_name(Factor::B), (b.dims().to_vec(), values(b)));
    }
    if let Some((w, b)) = &pkg.head {
        out.insert("head.weight".to_owned(), (w.dims().to_vec(), values(w)));
        out.insert("head.bias".to_owned(), (b.dims().to_vec(), values(b)));
    }
    out
}

/// The same tensors as the `safetensors` crate reads them from `bytes`.
fn reference_tensors(bytes: &[u8]) -> BTreeMap<String, (Vec<usize>, Vec<u32>)> {
    let st = safetensors::SafeTensors::deserialize(bytes)
        .expect("a package the reader accepts is valid safetensors");
    st.tensors()
        .into_iter()
        .map(|(name, view)| {
            assert_eq!(view.dtype(), safetensors::Dtype::F32, "{name}");
            let words = view
                .data()
                .chunks_exact(4)
                .map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]]))
                .collect();
            (name, (view.shape().to_vec(), words))
        })
        .collect()
}

fuzz_target!(|data: &[u8]| {
    let limits = Limits::default();
    let pkg = match AdapterPackage::from_bytes(data, FILE, &limits) {
        Ok(pkg) => pkg,
        Err(e) => {
            assert!(
                e.to_string().contains(FILE),
                "a refusal names the file: {e}"
            );
            return;
        }
    };
    let held = tensors(&pkg);
    assert_eq!(
        reference_tensors(data),
        held,
        "the package holds exactly the tensors of the file, under their names"
    );

    // Publishing hashes the uploaded bytes; the version is the hash of exactly those bytes.
    let upload = PackageBytes::from_slice(data, FILE, &limits).expect("size checked by the reader");
    assert_eq!(upload.version(), content_version(data));

    let written = pkg.to_bytes().expect("an accepted package writes");
    let again = AdapterPackage::from_bytes(&written, FILE, &limits)
        .unwrap_or_else(|e| panic!("a written package reads back: {e}"));
    assert_eq!(again.meta, pkg.meta, "metadata survives the writer");
    assert_eq!(tensors(&again), held, "tensors survive the writer");
    let rewritten = again.to_bytes().expect("writes again");
    assert_eq!(
        content_version(&rewritten),
        content_version(&written),
        "writing a read-back package gives the same bytes"
    );
    assert_eq!(rewritten, written);
    let (_, reference_meta) = safetensors::SafeTensors::read_metadata(&written).expect("valid");
    let meta_map = reference_meta.metadata().clone().unwrap_or_default();
    let (_, input_meta) = safetensors::SafeTensors::read_metadata(data).expect("valid");
    let input_map = input_meta.metadata().clone().unwrap_or_default();
    for key in ["base_fingerprint", "description"] {
        assert_eq!(
            meta_map.get(key).map(String::as_str).unwrap_or(""),
            input_map.get(key).map(String::as_str).unwrap_or(""),
            "{key} is written as read"
        );
    }

    let base = base();
    if pkg.validate(FILE, base, &limits).is_ok() {
        for (site, (a, b)) in &pkg.factors {
            let (out, inp) = base.shape(site).expect("validated sites exist in the base");
            assert_eq!(a.dims(), [pkg.meta.rank, inp], "{site} A");
            assert_eq!(b.dims(), [out, pkg.meta.rank], "{site} B");
        }
        let sites = pkg.factors.len();
        let rank = pkg.meta.rank;
        let adapter = Adapter::from_package("fuzz@input".to_owned(), pkg)
            .unwrap_or_else(|e| panic!("a validated package loads: {e}"));
        assert_eq!(adapter.sites().count(), sites);
        for (site, lowrank) in adapter.sites() {
            let (out, inp) = base.shape(site).expect("validated");
            assert_eq!(
                (
                    lowrank.rank(),
                    lowrank.in_features(),
                    lowrank.out_features()
                ),
                (rank, inp, out)
            );
        }
    }
});
