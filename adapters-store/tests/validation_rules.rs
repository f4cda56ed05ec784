//! One test per validation rule of the package format: each builds a package that breaks exactly
//! that rule and checks the refusal names the rule, the file and (where there is one) the tensor.
//! The last test checks that these cases cover every rule in `package::RULES`.

mod common;

use std::collections::{BTreeSet, HashMap};
use std::path::Path;

use safetensors::Dtype;
use safetensors::tensor::TensorView;
use switchyard_adapters::package::{Limits, RULES};
use switchyard_adapters::{AdapterPackage, PackageError};

use common::{FINGERPRINT, HIDDEN, spec, tagged};

const FILE: &str = "case.safetensors";

fn good_meta() -> HashMap<String, String> {
    [
        ("format_version", "1"),
        ("base_fingerprint", FINGERPRINT),
        ("rank", "4"),
        ("alpha", "8"),
        ("task", "embed"),
        ("description", "validation case"),
    ]
    .into_iter()
    .map(|(k, v)| (k.to_owned(), v.to_owned()))
    .collect()
}

/// A raw tensor: name, dtype, shape, little-endian bytes.
type Raw = (String, Dtype, Vec<usize>, Vec<u8>);

fn f32s(name: &str, shape: &[usize], value: f32) -> Raw {
    let n: usize = shape.iter().product();
    let bytes = (0..n).flat_map(|_| value.to_le_bytes()).collect();
    (name.to_owned(), Dtype::F32, shape.to_vec(), bytes)
}

/// A valid pair for layer 0's attn.q at rank 4.
fn q_pair() -> Vec<Raw> {
    vec![
        f32s("layers.0.attn.q.A", &[4, HIDDEN], 0.1),
        f32s("layers.0.attn.q.B", &[HIDDEN, 4], 0.1),
    ]
}

fn serialize(tensors: &[Raw], meta: HashMap<String, String>) -> Vec<u8> {
    let views: Vec<(String, TensorView<'_>)> = tensors
        .iter()
        .map(|(n, dt, shape, bytes)| {
            (
                n.clone(),
                TensorView::new(*dt, shape.clone(), bytes).unwrap(),
            )
        })
        .collect();
    safetensors::tensor::serialize(views, Some(meta)).unwrap()
}

fn parse(bytes: &[u8], limits: &Limits) -> Result<AdapterPackage, PackageError> {
    AdapterPackage::from_bytes(bytes, FILE, limits)
}

/// Parses with default limits and validates against the made-up base.
fn check(tensors: &[Raw], meta: HashMap<String, String>) -> PackageError {
    let limits = Limits::default();
    let bytes = serialize(tensors, meta);
    match parse(&bytes, &limits) {
        Err(e) => e,
        Ok(pkg) => pkg
            .validate(FILE, &spec(), &limits)
            .expect_err("the case must be refused"),
    }
}

fn assert_names(err: &PackageError, rule: &str, tensor: Option<&str>) {
    let msg = err.to_string();
    assert_eq!(err.rule(), rule, "{msg}");
    assert!(msg.contains(&format!("(rule: {rule})")), "{msg}");
    assert!(msg.contains(FILE) || msg.contains(".safetensors"), "{msg}");
    if let Some(t) = tensor {
        assert!(msg.contains(t), "message should name tensor {t}: {msg}");
    }
}

fn readable_file() -> PackageError {
    AdapterPackage::read(
        Path::new("no-such-dir/case.safetensors"),
        &Limits::default(),
    )
    .unwrap_err()
}

#[test]
fn rule_readable_file() {
    let e = readable_file();
    assert_names(&e, "readable file", None);
    assert!(e.to_string().contains("no-such-dir/case.safetensors"));
}

fn file_size() -> PackageError {
    let bytes = serialize(&q_pair(), good_meta());
    let limits = Limits {
        max_file_bytes: 100,
        ..Limits::default()
    };
    parse(&bytes, &limits).unwrap_err()
}

#[test]
fn rule_file_size() {
    let e = file_size();
    assert_names(&e, "file size", None);
    assert!(e.to_string().contains("limit of 100 bytes"), "{e}");
}

fn header_size() -> PackageError {
    let bytes = serialize(&q_pair(), good_meta());
    let limits = Limits {
        max_header_bytes: 64,
        ..Limits::default()
    };
    parse(&bytes, &limits).unwrap_err()
}

#[test]
fn rule_header_size() {
    let e = header_size();
    assert_names(&e, "header size", None);
    assert!(e.to_string().contains("limit of 64 bytes"), "{e}");
}

fn safetensors_structure() -> PackageError {
    let mut bytes = serialize(&q_pair(), good_meta());
    bytes.truncate(bytes.len() - 10);
    parse(&bytes, &Limits::default()).unwrap_err()
}

#[test]
fn rule_safetensors_structure_for_a_truncated_file() {
    assert_names(&safetensors_structure(), "safetensors structure", None);
    let garbage = b"\x10\0\0\0\0\0\0\0not json at all!";
    assert_names(
        &parse(garbage, &Limits::default()).unwrap_err(),
        "safetensors structure",
        None,
    );
}

fn metadata() -> PackageError {
    let mut meta = good_meta();
    meta.remove("task");
    check(&q_pair(), meta)
}

#[test]
fn rule_metadata_missing_and_unknown_keys() {
    let e = metadata();
    assert_names(&e, "metadata", Some("`task`"));
    assert!(e.to_string().contains("is missing"), "{e}");
    let mut meta = good_meta();
    meta.insert("trainer".to_owned(), "x".to_owned());
    let e = check(&q_pair(), meta);
    assert_names(&e, "metadata", Some("`trainer`"));
    assert!(e.to_string().contains("not a known key"), "{e}");
}

fn tensor_names() -> PackageError {
    let mut t = q_pair();
    t.push(f32s("layers.0.attn.query.A", &[4, HIDDEN], 0.1));
    check(&t, good_meta())
}

#[test]
fn rule_tensor_names() {
    assert_names(
        &tensor_names(),
        "tensor names",
        Some("layers.0.attn.query.A"),
    );
    // A package with no factors at all is refused under the same rule.
    let e = check(&[], good_meta());
    assert_names(&e, "tensor names", None);
}

fn dtype() -> PackageError {
    let mut t = q_pair();
    t[0] = (
        "layers.0.attn.q.A".to_owned(),
        Dtype::F16,
        vec![4, HIDDEN],
        vec![0u8; 4 * HIDDEN * 2],
    );
    check(&t, good_meta())
}

#[test]
fn rule_dtype() {
    let e = dtype();
    assert_names(&e, "dtype", Some("layers.0.attn.q.A"));
    assert!(e.to_string().contains("F16"), "{e}");
}

fn factor_pairs() -> PackageError {
    let mut t = q_pair();
    t.pop();
    check(&t, good_meta())
}

#[test]
fn rule_factor_pairs() {
    assert_names(&factor_pairs(), "factor pairs", Some("layers.0.attn.q.B"));
}

fn shapes() -> PackageError {
    let t = vec![
        f32s("layers.0.attn.q.A", &[4, HIDDEN - 1], 0.1),
        f32s("layers.0.attn.q.B", &[HIDDEN, 4], 0.1),
    ];
    check(&t, good_meta())
}

#[test]
fn rule_shapes_against_the_base() {
    let e = shapes();
    assert_names(&e, "shapes", Some("layers.0.attn.q.A"));
    assert!(e.to_string().contains("takes 32 inputs"), "{e}");
    // A layer the base does not have.
    let t = vec![
        f32s("layers.9.attn.q.A", &[4, HIDDEN], 0.1),
        f32s("layers.9.attn.q.B", &[HIDDEN, 4], 0.1),
    ];
    assert_names(&check(&t, good_meta()), "shapes", Some("layers.9.attn.q.A"));
}

fn rank() -> PackageError {
    // Rank 40 on a 32×32 matrix: above min(in, out) = 32.
    let mut meta = good_meta();
    meta.insert("rank".to_owned(), "40".to_owned());
    let t = vec![
        f32s("layers.0.attn.q.A", &[40, HIDDEN], 0.1),
        f32s("layers.0.attn.q.B", &[HIDDEN, 40], 0.1),
    ];
    check(&t, meta)
}

#[test]
fn rule_rank_above_min_in_out_and_above_the_configured_maximum() {
    let e = rank();
    assert_names(&e, "rank", Some("layers.0.attn.q.A"));
    assert!(e.to_string().contains("min(in, out) = 32"), "{e}");
    let limits = Limits {
        max_rank: 2,
        ..Limits::default()
    };
    let e = parse(&serialize(&q_pair(), good_meta()), &limits).unwrap_err();
    assert_names(&e, "rank", None);
    assert!(e.to_string().contains("configured maximum 2"), "{e}");
    // A's rows disagree with the declared rank.
    let mut meta = good_meta();
    meta.insert("rank".to_owned(), "3".to_owned());
    assert_names(&check(&q_pair(), meta), "rank", Some("layers.0.attn.q.A"));
}

fn alpha() -> PackageError {
    let mut meta = good_meta();
    meta.insert("alpha".to_owned(), "-1".to_owned());
    check(&q_pair(), meta)
}

#[test]
fn rule_alpha_not_finite_or_not_positive() {
    assert_names(&alpha(), "alpha", Some("-1"));
    for bad in ["0", "NaN", "inf", "sixteen"] {
        let mut meta = good_meta();
        meta.insert("alpha".to_owned(), bad.to_owned());
        assert_names(&check(&q_pair(), meta), "alpha", Some(bad));
    }
}

fn finite_values() -> PackageError {
    let mut t = q_pair();
    let bytes = &mut t[1].3;
    bytes[20..24].copy_from_slice(&f32::NAN.to_le_bytes());
    check(&t, good_meta())
}

#[test]
fn rule_finite_values() {
    let e = finite_values();
    assert_names(&e, "finite values", Some("layers.0.attn.q.B"));
    assert!(e.to_string().contains("flat index 5"), "{e}");
}

fn base_fingerprint() -> PackageError {
    let mut meta = good_meta();
    meta.insert("base_fingerprint".to_owned(), "0000000000000000".to_owned());
    check(&q_pair(), meta)
}

#[test]
fn rule_base_fingerprint() {
    let e = base_fingerprint();
    assert_names(&e, "base fingerprint", None);
    assert!(
        e.to_string().contains("0000000000000000") && e.to_string().contains(FINGERPRINT),
        "{e}"
    );
}

fn head_shape() -> PackageError {
    let mut meta = good_meta();
    meta.insert("task".to_owned(), "classify".to_owned());
    meta.insert("labels".to_owned(), r#"["flat","wheel"]"#.to_owned());
    let mut t = q_pair();
    t.push(f32s("head.weight", &[3, HIDDEN], 0.1));
    t.push(f32s("head.bias", &[3], 0.0));
    check(&t, meta)
}

#[test]
fn rule_head_shape_against_labels_and_hidden_size() {
    let e = head_shape();
    assert_names(&e, "head shape", Some("head.weight"));
    assert!(e.to_string().contains("2 labels"), "{e}");
    let mut meta = good_meta();
    meta.insert("task".to_owned(), "classify".to_owned());
    meta.insert("labels".to_owned(), r#"["flat","wheel"]"#.to_owned());
    let mut t = q_pair();
    t.push(f32s("head.weight", &[2, HIDDEN + 1], 0.1));
    t.push(f32s("head.bias", &[2], 0.0));
    let e = check(&t, meta);
    assert_names(&e, "head shape", Some("head.weight"));
    assert!(e.to_string().contains("hidden size is 32"), "{e}");
}

#[test]
fn a_valid_package_passes_every_rule() {
    let limits = Limits::default();
    let bytes = tagged(4, 0.5).to_bytes().unwrap();
    let pkg = parse(&bytes, &limits).unwrap();
    pkg.validate(FILE, &spec(), &limits).unwrap();
}

#[test]
fn the_cases_above_cover_every_rule() {
    let cases = [
        readable_file(),
        file_size(),
        header_size(),
        safetensors_structure(),
        metadata(),
        tensor_names(),
        dtype(),
        factor_pairs(),
        shapes(),
        rank(),
        alpha(),
        finite_values(),
        base_fingerprint(),
        head_shape(),
    ];
    let covered: BTreeSet<&str> = cases.iter().map(|e| e.rule()).collect();
    let all: BTreeSet<&str> = RULES.into_iter().collect();
    assert_eq!(covered, all);
}
