//! oneDNN, loaded at run time, for the compute-bound products of f32 weights.
//!
//! Measured side by side (`scripts/bench-onednn`, on a 2-vCPU Xeon with AVX-512 and AMX),
//! oneDNN 2.6's f32 matmul, reading our packed weights in place, runs the encoder's and a
//! prefill's products 1.3-2.2x faster than our own AVX-512 kernel, while for a few rows
//! (decode) ours is as fast or faster. So an f32 product of many rows goes to oneDNN when it is
//! there, and everything else stays ours:
//!
//! - It reads our packed weights where they lie: an f32 panel (16 outputs, input-major) is
//!   oneDNN's `BA16a16b` layout when the inputs are a multiple of 16 and the outputs fill whole
//!   panels. No second copy of any weight is made; other shapes run on our kernels.
//! - bf16 stays ours: oneDNN's AMX matmul is 2-3x our AMX kernel in the 64-wide layout it
//!   prefers (`BA16a64b2a`), but reading our 16-wide bf16 panels (`BA16a16b2a`) it ran at
//!   0.6-1.0x ours, and its own layout would mean a second copy of every weight or a new
//!   layout for every bf16 kernel (an open item).
//! - Low-rank terms: each term's down product `s x A^T` and its up product `z B^T` run on our
//!   kernel after oneDNN's base product, in tasks of 128 rows across the pool: one pass over
//!   the term's own rows of the output, and one more read of its rows of the input (not fused
//!   into the base product as on our own path). Measured on the encoder (`cpu_paths`): one
//!   rank-8 adapter on every projection costs 1.09-1.15x the base, 1.09-1.12x with ours alone.
//! - Loading: `SWITCHYARD_ONEDNN` unset looks for `libdnnl.so.2` where the loader finds it and
//!   then in this checkout's `target/tools` (where `scripts/unpack-deb libdnnl2` puts Debian's
//!   copy); a path names the library; `off` never loads it. Nothing in the build links it, so a
//!   machine without it runs our kernels for every product. [`status`] says which, for the
//!   start-up log, `/metrics` and the reports.
//!
//! oneDNN runs its products on its own OpenMP threads (as many as the rayon pool), called only
//! from outside the rayon pool: a product started on a pool thread (one of many small ones
//! side by side) stays ours.
#![allow(unsafe_code)]

use std::collections::HashMap;
use std::ffi::{CStr, CString, c_char, c_int, c_void};
use std::sync::{Mutex, OnceLock};

type Handle = *mut c_void;
type Status = c_int;

unsafe extern "C" {
    fn dlopen(filename: *const c_char, flag: c_int) -> *mut c_void;
    fn dlsym(handle: *mut c_void, symbol: *const c_char) -> *mut c_void;
    fn dlerror() -> *const c_char;
}
const RTLD_NOW: c_int = 2;
const RTLD_GLOBAL: c_int = 0x100;

/// oneDNN 2.6's `dnnl_memory_desc_t` is 696 bytes and `dnnl_matmul_desc_t` 2800 (`sizeof`
/// against Debian's headers); the library only writes them and reads them back by pointer, so
/// opaque buffers at least that large, and aligned, stand for them.
#[repr(C, align(64))]
pub struct MemoryDesc([u8; 1024]);
#[repr(C, align(64))]
pub struct OpDesc([u8; 4096]);

impl MemoryDesc {
    fn new() -> Box<MemoryDesc> {
        Box::new(MemoryDesc([0; 1024]))
    }
}

impl OpDesc {
    pub fn new() -> Box<OpDesc> {
        Box::new(OpDesc([0; 4096]))
    }
}

/// One argument of `dnnl_primitive_execute`.
#[repr(C)]
pub struct ExecArg {
    pub arg: c_int,
    pub memory: Handle,
}

// Values from oneDNN 2.6's dnnl_types.h.
pub const CPU: c_int = 1;
pub const BF16: c_int = 2;
pub const F32: c_int = 3;
pub const TAG_ANY: c_int = 1;
pub const TAG_AB: c_int = 3;
pub const TAG_BA: c_int = 22;
pub const QUERY_IMPL_INFO_STR: c_int = 8;
pub const QUERY_WEIGHTS_MD: c_int = 131;
pub const ARG_SRC: c_int = 1;
pub const ARG_DST: c_int = 17;
pub const ARG_WEIGHTS: c_int = 33;
pub const ARG_BIAS: c_int = 41;
/// `DNNL_MEMORY_ALLOCATE`: the library allocates the buffer.
pub const ALLOCATE: *mut c_void = usize::MAX as *mut c_void;

pub type Sgemm = unsafe extern "C" fn(
    c_char,
    c_char,
    i64,
    i64,
    i64,
    f32,
    *const f32,
    i64,
    *const f32,
    i64,
    f32,
    *mut f32,
    i64,
) -> Status;
pub type GemmS8 = unsafe extern "C" fn(
    c_char,
    c_char,
    c_char,
    i64,
    i64,
    i64,
    f32,
    *const i8,
    i64,
    i8,
    *const i8,
    i64,
    i8,
    f32,
    *mut i32,
    i64,
    *const i32,
) -> Status;

/// The oneDNN entry points switchyard calls (and the benchmark's comparison calls), with one
/// CPU engine. Every function pointer is cast to the signature of oneDNN 2.6's `dnnl.h`.
pub struct OneDnn {
    pub sgemm: Sgemm,
    pub gemm_s8s8s32: GemmS8,
    pub md_by_tag: unsafe extern "C" fn(*mut MemoryDesc, c_int, *const i64, c_int, c_int) -> Status,
    pub md_size: unsafe extern "C" fn(*const MemoryDesc) -> usize,
    pub matmul_desc: unsafe extern "C" fn(
        *mut OpDesc,
        *const MemoryDesc,
        *const MemoryDesc,
        *const MemoryDesc,
        *const MemoryDesc,
    ) -> Status,
    pub pd_create:
        unsafe extern "C" fn(*mut Handle, *const OpDesc, Handle, Handle, Handle) -> Status,
    pub reorder_pd_create: unsafe extern "C" fn(
        *mut Handle,
        *const MemoryDesc,
        Handle,
        *const MemoryDesc,
        Handle,
        Handle,
    ) -> Status,
    pub pd_query: unsafe extern "C" fn(Handle, c_int, c_int, *mut c_void) -> Status,
    pub pd_query_md: unsafe extern "C" fn(Handle, c_int, c_int) -> *const MemoryDesc,
    pub pd_destroy: unsafe extern "C" fn(Handle) -> Status,
    pub primitive_create: unsafe extern "C" fn(*mut Handle, Handle) -> Status,
    pub execute: unsafe extern "C" fn(Handle, Handle, c_int, *const ExecArg) -> Status,
    pub memory_create:
        unsafe extern "C" fn(*mut Handle, *const MemoryDesc, Handle, *mut c_void) -> Status,
    pub memory_destroy: unsafe extern "C" fn(Handle) -> Status,
    pub memory_set_handle: unsafe extern "C" fn(Handle, *mut c_void) -> Status,
    pub stream_create: unsafe extern "C" fn(*mut Handle, Handle, u32) -> Status,
    pub stream_wait: unsafe extern "C" fn(Handle) -> Status,
    attr_create: unsafe extern "C" fn(*mut Handle) -> Status,
    attr_destroy: unsafe extern "C" fn(Handle) -> Status,
    post_ops_create: unsafe extern "C" fn(*mut Handle) -> Status,
    post_ops_destroy: unsafe extern "C" fn(Handle) -> Status,
    post_ops_append_sum: unsafe extern "C" fn(Handle, f32) -> Status,
    attr_set_post_ops: unsafe extern "C" fn(Handle, Handle) -> Status,
    effective_isa: unsafe extern "C" fn() -> c_int,
    omp_set_num_threads: Option<unsafe extern "C" fn(c_int)>,
    pub engine: Handle,
    /// Where it was loaded from.
    pub from: String,
    /// Matmul primitives made so far, by shape (oneDNN's own cache keeps their code).
    primitives: Mutex<HashMap<Key, Result<Primitive, String>>>,
}

// SAFETY: the engine and primitives are documented thread-safe in oneDNN (primitives may be
// executed from several threads at once, each with its own stream); the function pointers are
// plain code addresses.
unsafe impl Send for OneDnn {}
// SAFETY: as above.
unsafe impl Sync for OneDnn {}

/// `Err` with the library's status when a call fails.
pub fn check(status: Status, what: &str) -> Result<(), String> {
    if status == 0 {
        Ok(())
    } else {
        Err(format!("oneDNN {what} failed with status {status}"))
    }
}

/// A symbol's address as the function pointer type `F`.
///
/// # Safety
/// `F` is the `unsafe extern "C" fn` type of the function at `p`.
unsafe fn cast<F: Copy>(p: *mut c_void) -> F {
    assert_eq!(std::mem::size_of::<F>(), std::mem::size_of::<*mut c_void>());
    // SAFETY: same size (checked); the caller's contract for the type.
    unsafe { std::mem::transmute_copy(&p) }
}

fn dl_error() -> String {
    // SAFETY: dlerror returns null or a NUL-terminated string the loader owns.
    unsafe {
        let e = dlerror();
        if e.is_null() {
            "unknown error".into()
        } else {
            CStr::from_ptr(e).to_string_lossy().into_owned()
        }
    }
}

/// Where Debian's copy lands when `scripts/unpack-deb libdnnl2` fetches it into this checkout.
const CHECKOUT_COPY: &str = concat!(
    env!("CARGO_MANIFEST_DIR"),
    "/../target/tools/usr/lib/x86_64-linux-gnu/libdnnl.so.2"
);

/// The library, loaded once as `SWITCHYARD_ONEDNN` says; `None` when it is off, absent, or
/// turned off with [`set_enabled`].
pub fn get() -> Option<&'static OneDnn> {
    if !ENABLED.load(std::sync::atomic::Ordering::Relaxed) {
        return None;
    }
    loaded().as_ref().ok()
}

static ENABLED: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(true);

/// Turns the products' use of oneDNN off (or back on) for the whole process: benchmarks time
/// our own kernels and oneDNN in turns with it. The library stays loaded.
pub fn set_enabled(on: bool) {
    ENABLED.store(on, std::sync::atomic::Ordering::Relaxed);
}

/// The library as loaded, whether or not [`set_enabled`] turned its use off.
pub fn loaded_library() -> Option<&'static OneDnn> {
    loaded().as_ref().ok()
}

/// One line for logs, metrics and reports: where oneDNN was loaded from and the instruction
/// set it runs, or why it is not used.
pub fn status() -> String {
    match loaded() {
        Ok(d) => format!("oneDNN from {} ({})", d.from, d.isa()),
        Err(why) => format!("oneDNN not used: {why}"),
    }
}

/// Loads oneDNN at program start. Unless `OMP_WAIT_POLICY` is set, it is set to `PASSIVE`
/// first: by default OpenMP's threads spin for a while after each product, and on a machine
/// with as many cores as threads that spinning takes the cores from the work between products
/// (measured: the f32 encoder ran 170 ms per batch with ours alone, 188 ms with oneDNN's
/// threads spinning, 149 ms with them passive). Returns [`status`].
///
/// # Safety
/// Changes the process environment: call it before any other thread starts (first thing in
/// `main`).
pub unsafe fn load_at_start() -> String {
    let off = std::env::var("SWITCHYARD_ONEDNN").is_ok_and(|v| v.trim() == "off");
    if !off && std::env::var_os("OMP_WAIT_POLICY").is_none() {
        // SAFETY: the caller's contract: no other thread reads the environment now.
        unsafe { std::env::set_var("OMP_WAIT_POLICY", "PASSIVE") };
    }
    let _ = loaded();
    status()
}

/// Whether products of `format` weights on `path` go to oneDNN when they are large enough
/// (`kernels::matmul` decides per call; this is for reports).
pub fn takes(path: crate::Path, format: crate::WeightFormat) -> bool {
    format == crate::WeightFormat::F32 && path >= crate::Path::Avx512 && get().is_some()
}

/// A short description for reports: what oneDNN runs here, or `None`.
pub fn in_use(path: crate::Path, format: crate::WeightFormat) -> Option<String> {
    takes(path, format).then(|| {
        format!(
            "oneDNN for f32 products of {}+ rows ({})",
            crate::matmul::LIBRARY_ROWS_F32,
            get().map(OneDnn::isa).unwrap_or_default()
        )
    })
}

fn loaded() -> &'static Result<OneDnn, String> {
    static LIB: OnceLock<Result<OneDnn, String>> = OnceLock::new();
    LIB.get_or_init(|| {
        let setting = std::env::var("SWITCHYARD_ONEDNN").unwrap_or_default();
        let candidates: Vec<String> = match setting.trim() {
            "off" => return Err("SWITCHYARD_ONEDNN=off".into()),
            "" | "auto" => vec!["libdnnl.so.2".into(), CHECKOUT_COPY.into()],
            path => vec![path.to_owned()],
        };
        let mut errors = Vec::new();
        for lib in &candidates {
            match OneDnn::load(lib) {
                Ok(d) => return Ok(d),
                Err(e) => errors.push(e),
            }
        }
        Err(format!("not found ({})", errors.join("; ")))
    })
}

impl OneDnn {
    fn load(lib: &str) -> Result<OneDnn, String> {
        let path = std::path::Path::new(lib);
        if lib.contains('/') && !path.exists() {
            return Err(format!("{lib}: no such file"));
        }
        // libdnnl links the OpenCL loader: a copy beside it (Debian's, unpacked with it) is
        // loaded first so that dependency is met without an install.
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            let opencl = dir.join("libOpenCL.so.1");
            if opencl.exists() {
                let c =
                    CString::new(opencl.to_string_lossy().as_bytes()).map_err(|e| e.to_string())?;
                // SAFETY: a valid NUL-terminated path.
                unsafe { dlopen(c.as_ptr(), RTLD_NOW | RTLD_GLOBAL) };
            }
        }
        let c = CString::new(lib.as_bytes()).map_err(|e| e.to_string())?;
        // SAFETY: a valid NUL-terminated path.
        let handle = unsafe { dlopen(c.as_ptr(), RTLD_NOW) };
        if handle.is_null() {
            return Err(format!("{lib}: {}", dl_error()));
        }
        let sym = |name: &str| -> Result<*mut c_void, String> {
            let c = CString::new(name).map_err(|e| e.to_string())?;
            // SAFETY: a loaded library and a NUL-terminated name.
            let p = unsafe { dlsym(handle, c.as_ptr()) };
            if p.is_null() {
                Err(format!("{lib} has no symbol {name} (oneDNN 2.x is needed)"))
            } else {
                Ok(p)
            }
        };
        // SAFETY (every cast): the symbol is the oneDNN 2.6 function of that name, cast to
        // the signature dnnl.h declares for it; the field's type spells that signature.
        let mut d = unsafe {
            OneDnn {
                sgemm: cast(sym("dnnl_sgemm")?),
                gemm_s8s8s32: cast(sym("dnnl_gemm_s8s8s32")?),
                md_by_tag: cast(sym("dnnl_memory_desc_init_by_tag")?),
                md_size: cast(sym("dnnl_memory_desc_get_size")?),
                matmul_desc: cast(sym("dnnl_matmul_desc_init")?),
                pd_create: cast(sym("dnnl_primitive_desc_create")?),
                reorder_pd_create: cast(sym("dnnl_reorder_primitive_desc_create")?),
                pd_query: cast(sym("dnnl_primitive_desc_query")?),
                pd_query_md: cast(sym("dnnl_primitive_desc_query_md")?),
                pd_destroy: cast(sym("dnnl_primitive_desc_destroy")?),
                primitive_create: cast(sym("dnnl_primitive_create")?),
                execute: cast(sym("dnnl_primitive_execute")?),
                memory_create: cast(sym("dnnl_memory_create")?),
                memory_destroy: cast(sym("dnnl_memory_destroy")?),
                memory_set_handle: cast(sym("dnnl_memory_set_data_handle")?),
                stream_create: cast(sym("dnnl_stream_create")?),
                stream_wait: cast(sym("dnnl_stream_wait")?),
                attr_create: cast(sym("dnnl_primitive_attr_create")?),
                attr_destroy: cast(sym("dnnl_primitive_attr_destroy")?),
                post_ops_create: cast(sym("dnnl_post_ops_create")?),
                post_ops_destroy: cast(sym("dnnl_post_ops_destroy")?),
                post_ops_append_sum: cast(sym("dnnl_post_ops_append_sum")?),
                attr_set_post_ops: cast(sym("dnnl_primitive_attr_set_post_ops")?),
                effective_isa: cast(sym("dnnl_get_effective_cpu_isa")?),
                // From the OpenMP runtime libdnnl links (dlsym searches its dependencies).
                omp_set_num_threads: sym("omp_set_num_threads")
                    .ok()
                    .map(|p| cast::<unsafe extern "C" fn(c_int)>(p)),
                engine: std::ptr::null_mut(),
                from: lib.to_owned(),
                primitives: Mutex::new(HashMap::new()),
            }
        };
        let engine_create: unsafe extern "C" fn(*mut Handle, c_int, usize) -> Status =
            // SAFETY: as above.
            unsafe { cast(sym("dnnl_engine_create")?) };
        // SAFETY: an out-pointer to the field.
        check(
            unsafe { engine_create(&mut d.engine, CPU, 0) },
            "engine_create",
        )?;
        Ok(d)
    }

    /// The instruction set oneDNN dispatches to on this CPU.
    pub fn isa(&self) -> String {
        // SAFETY: no arguments.
        let v = unsafe { (self.effective_isa)() };
        let name = match v {
            0x7 => "avx2",
            0x27 => "avx512_core",
            0x67 => "avx512_core_vnni",
            0xe7 => "avx512_core_bf16",
            0x3e7 => "avx512_core_amx",
            0x407 => "avx2_vnni",
            _ => "another instruction set",
        };
        format!("{name}, 0x{v:x}")
    }

    /// A memory descriptor of a 2-D tensor.
    pub fn md(&self, dims: [i64; 2], dtype: c_int, tag: c_int) -> Result<Box<MemoryDesc>, String> {
        let mut md = MemoryDesc::new();
        // SAFETY: md is large enough for a dnnl_memory_desc_t; dims has 2 entries.
        check(
            unsafe { (self.md_by_tag)(&mut *md, 2, dims.as_ptr(), dtype, tag) },
            "memory_desc_init_by_tag",
        )?;
        Ok(md)
    }

    /// A memory object over `data` (or one the library allocates, with [`ALLOCATE`]).
    ///
    /// # Safety
    /// `md` was made by the library; `data` is [`ALLOCATE`] or a buffer of `md`'s size that
    /// outlives every use of the memory object.
    pub unsafe fn memory(&self, md: &MemoryDesc, data: *mut c_void) -> Result<Handle, String> {
        let mut m = std::ptr::null_mut();
        // SAFETY: the caller's contract.
        check(
            unsafe { (self.memory_create)(&mut m, md, self.engine, data) },
            "memory_create",
        )?;
        Ok(m)
    }

    /// Runs `primitive` on a stream of this thread and waits for it.
    ///
    /// # Safety
    /// `primitive` was made by this library and `args` are the memory objects it expects, over
    /// live buffers.
    pub unsafe fn run(&self, primitive: Handle, args: &[ExecArg]) -> Result<(), String> {
        thread_local! {
            static STREAM: std::cell::Cell<Handle> = const { std::cell::Cell::new(std::ptr::null_mut()) };
        }
        let stream = STREAM.with(|s| {
            if s.get().is_null() {
                let mut h = std::ptr::null_mut();
                // SAFETY: an out-pointer to a local; flags 1 is dnnl_stream_default_flags.
                check(
                    unsafe { (self.stream_create)(&mut h, self.engine, 1) },
                    "stream_create",
                )?;
                // OpenMP's thread count is per calling thread: as many as our pool has.
                if let Some(set) = self.omp_set_num_threads {
                    // SAFETY: a plain int argument.
                    unsafe { set(crate::threads::rayon_threads() as c_int) };
                }
                s.set(h);
            }
            Ok::<_, String>(s.get())
        })?;
        // SAFETY: a primitive made by this library and the memories it expects.
        unsafe {
            check(
                (self.execute)(primitive, stream, args.len() as c_int, args.as_ptr()),
                "primitive_execute",
            )?;
            check((self.stream_wait)(stream), "stream_wait")
        }
    }

    /// A matmul primitive descriptor (`src [m, k] x weights [k, n] -> dst [m, n]`, f32 dst),
    /// optionally with a bias `[1, n]` and the sum post-op (`dst += ...`).
    #[allow(clippy::too_many_arguments)]
    pub fn matmul_pd(
        &self,
        src: &MemoryDesc,
        weights: &MemoryDesc,
        bias: Option<&MemoryDesc>,
        dst: &MemoryDesc,
        accumulate: bool,
    ) -> Result<Handle, String> {
        let mut op = OpDesc::new();
        let mut pd = std::ptr::null_mut();
        let mut attr = std::ptr::null_mut();
        // SAFETY: descriptors made by the library; out-pointers to locals; the attribute and
        // post-ops objects are destroyed once the descriptor holds its own copy.
        unsafe {
            check(
                (self.matmul_desc)(
                    &mut *op,
                    src,
                    weights,
                    bias.map_or(std::ptr::null(), |b| b as *const MemoryDesc),
                    dst,
                ),
                "matmul_desc_init",
            )?;
            if accumulate {
                let mut ops = std::ptr::null_mut();
                check((self.attr_create)(&mut attr), "primitive_attr_create")?;
                check((self.post_ops_create)(&mut ops), "post_ops_create")?;
                check((self.post_ops_append_sum)(ops, 1.0), "post_ops_append_sum")?;
                check((self.attr_set_post_ops)(attr, ops), "attr_set_post_ops")?;
                (self.post_ops_destroy)(ops);
            }
            let made = (self.pd_create)(&mut pd, &*op, attr, self.engine, std::ptr::null_mut());
            if !attr.is_null() {
                (self.attr_destroy)(attr);
            }
            check(made, "primitive_desc_create (matmul)")?;
        }
        Ok(pd)
    }

    /// The implementation oneDNN picked for a primitive descriptor (e.g. `brg:avx512_core_amx`).
    ///
    /// # Safety
    /// `pd` is a live primitive descriptor of this library.
    pub unsafe fn impl_name(&self, pd: Handle) -> String {
        let mut info: *const c_char = std::ptr::null();
        // SAFETY: an out-pointer to a local; the library returns a string it owns.
        unsafe {
            if (self.pd_query)(
                pd,
                QUERY_IMPL_INFO_STR,
                0,
                (&mut info as *mut *const c_char).cast(),
            ) != 0
                || info.is_null()
            {
                return "?".into();
            }
            CStr::from_ptr(info).to_string_lossy().into_owned()
        }
    }
}

/// A cached matmul primitive for one shape, and the descriptors its memories are made from.
struct Primitive {
    primitive: Handle,
    src: Box<MemoryDesc>,
    weights: Box<MemoryDesc>,
    bias: Option<Box<MemoryDesc>>,
    dst: Box<MemoryDesc>,
}

#[derive(Clone, Copy, PartialEq, Eq, Hash)]
struct Key {
    m: usize,
    k: usize,
    n: usize,
    accumulate: bool,
    bias: bool,
}

/// Shapes kept; past this the cache starts again (a server sees a bounded set of row counts
/// per model, a benchmark a few).
const MAX_PRIMITIVES: usize = 512;

impl OneDnn {
    /// `y [m, n] = (accumulate ? y : 0) + x [m, k] W^T + bias` with `W` our packed f32 panels
    /// (`weights`: their address and bytes). `Err` (before anything is written) when
    /// oneDNN refuses the shape or its layout does not match ours byte for byte; the caller
    /// then runs our kernel.
    ///
    /// # Panics
    /// When oneDNN fails while running the product (the output may be partly written).
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn matmul(
        &self,
        y: &mut [f32],
        x: *const f32,
        m: usize,
        k: usize,
        n: usize,
        (weights, weight_bytes): (*const c_void, usize),
        accumulate: bool,
        bias: Option<&[f32]>,
    ) -> Result<(), String> {
        let key = Key {
            m,
            k,
            n,
            accumulate,
            bias: bias.is_some(),
        };
        let mut cache = self.primitives.lock().unwrap_or_else(|p| p.into_inner());
        if !cache.contains_key(&key) {
            if cache.len() >= MAX_PRIMITIVES {
                cache.clear();
            }
            // A shape oneDNN refuses, or lays out otherwise than we do, is remembered too, so
            // it is asked once.
            let made = self.make(key).and_then(|p| {
                // SAFETY: a descriptor made by the library.
                let expected = unsafe { (self.md_size)(&*p.weights) };
                if expected == weight_bytes {
                    Ok(p)
                } else {
                    Err(format!(
                        "oneDNN's layout for [{k} x {n}] takes {expected} bytes, ours {weight_bytes}"
                    ))
                }
            });
            cache.insert(key, made);
        }
        let p = cache[&key].as_ref().map_err(Clone::clone)?;
        let primitive = p.primitive;
        // SAFETY: descriptors made by the library, over the caller's buffers of their sizes
        // (x [m, k], the weights checked above, y [m, n], the bias [n]), alive for this call;
        // the objects are destroyed before it returns.
        let ran = unsafe {
            let mut mems = vec![
                (ARG_SRC, self.memory(&p.src, x as *mut c_void)?),
                (
                    ARG_WEIGHTS,
                    self.memory(&p.weights, weights as *mut c_void)?,
                ),
                (ARG_DST, self.memory(&p.dst, y.as_mut_ptr().cast())?),
            ];
            if let (Some(md), Some(b)) = (&p.bias, bias) {
                mems.push((ARG_BIAS, self.memory(md, b.as_ptr() as *mut c_void)?));
            }
            drop(cache);
            let args: Vec<ExecArg> = mems
                .iter()
                .map(|&(arg, memory)| ExecArg { arg, memory })
                .collect();
            let ran = self.run(primitive, &args);
            for (_, m) in mems {
                (self.memory_destroy)(m);
            }
            ran
        };
        // The output may be partly written: no falling back from here.
        if let Err(e) = ran {
            panic!("{e} on a [{m} x {k}] x [{k} x {n}] product");
        }
        Ok(())
    }

    fn make(&self, key: Key) -> Result<Primitive, String> {
        let (m, k, n) = (key.m as i64, key.k as i64, key.n as i64);
        let src = self.md([m, k], F32, TAG_AB)?;
        let weights = self.md([k, n], F32, TAG_BA16A16B)?;
        let dst = self.md([m, n], F32, TAG_AB)?;
        let bias = if key.bias {
            Some(self.md([1, n], F32, TAG_AB)?)
        } else {
            None
        };
        let pd = self.matmul_pd(&src, &weights, bias.as_deref(), &dst, key.accumulate)?;
        let mut primitive = std::ptr::null_mut();
        // SAFETY: a descriptor made above; the primitive keeps what it needs of it.
        let made = unsafe { (self.primitive_create)(&mut primitive, pd) };
        // SAFETY: not used after this.
        unsafe { (self.pd_destroy)(pd) };
        check(made, "primitive_create (matmul)")?;
        Ok(Primitive {
            primitive,
            src,
            weights,
            bias,
            dst,
        })
    }
}

/// `BA16a16b`: 16 outputs outermost, then blocks of 16 inputs, each 16 inputs x 16 outputs —
/// our f32 panel when the inputs are a multiple of 16.
const TAG_BA16A16B: c_int = 499;
