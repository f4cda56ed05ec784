//! The adapter store: publish, list, show, set live, rollback and retire as a user sees them, the
//! name rules, and concurrent publishers that must never leave a torn file or a pointer to a
//! version that is not there. One suite, run against both backends: every test that takes a
//! [`Backend`] runs once on local disk (`disk::`) and once on a real S3-compatible server
//! (`object::`, an `s3s-fs` process on 127.0.0.1). The disk store's own file layout (pointer file,
//! temporary files) is tested at the end.

mod common;

use std::sync::{Arc, Barrier};

use switchyard_adapters::package::{Limits, content_version};
use switchyard_adapters::store::{POINTER_FILE, Store, StoreError, TEMP_PREFIX};
use switchyard_adapters::{AdapterName, PackageBytes};

use common::s3::S3Server;
use common::{spec, tagged};

/// A store on one backend, with what keeps it alive.
struct Backend {
    store: Store,
    server: Option<S3Server>,
    dir: tempfile::TempDir,
}

fn on_disk() -> Backend {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::create(&dir.path().join("store"), Limits::default()).unwrap();
    Backend {
        store,
        server: None,
        dir,
    }
}

fn on_object_store() -> Backend {
    let server = S3Server::start();
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open_remote(
        &server.config("fleet/store"),
        &dir.path().join("cache"),
        64 << 20,
        Limits::default(),
    )
    .unwrap();
    Backend {
        store,
        server: Some(server),
        dir,
    }
}

/// Runs each named test once per backend.
macro_rules! on_both_backends {
    ($($test:ident),* $(,)?) => {
        mod disk {
            $(#[test] fn $test() { super::$test(super::on_disk()) })*
        }
        mod object {
            $(#[test] fn $test() { super::$test(super::on_object_store()) })*
        }
    };
}

on_both_backends!(
    publish_makes_the_version_live_and_keeps_history_for_rollback,
    republishing_the_same_bytes_writes_nothing_and_flips_nothing,
    retire_is_refused_while_live_and_drops_the_version_from_history,
    unknown_names_versions_and_bad_versions_are_clear_errors,
    publishing_an_invalid_package_leaves_the_store_untouched,
    show_reads_the_package_metadata,
    concurrent_publishers_never_leave_a_torn_file_or_a_dangling_pointer,
    two_stores_on_one_backend_see_each_others_changes,
);

fn name(n: &str) -> AdapterName {
    AdapterName::new(n).unwrap()
}

fn bytes(tag: f32) -> PackageBytes {
    let raw = tagged(4, tag).to_bytes().unwrap();
    PackageBytes::from_slice(&raw, "mem", &Limits::default()).unwrap()
}

fn new_store() -> (tempfile::TempDir, Store) {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::create(&dir.path().join("store"), Limits::default()).unwrap();
    (dir, store)
}

fn publish_makes_the_version_live_and_keeps_history_for_rollback(backend: Backend) {
    let store = &backend.store;
    let n = name("support-bot");
    let v1 = store.publish(&n, bytes(1.0), "v1", Some(&spec())).unwrap();
    assert_eq!(v1.replaced, None);
    assert!(v1.new_file);
    let v2 = store.publish(&n, bytes(2.0), "v2", Some(&spec())).unwrap();
    assert_eq!(v2.replaced.as_deref(), Some(v1.version.as_str()));
    assert_eq!(store.live(&n).unwrap(), v2.version);

    // The version is the content hash of the stored file, and the file is the package.
    let published = tagged(4, 2.0).to_bytes().unwrap();
    assert_eq!(content_version(&published), v2.version);
    let (stored, hash) = store.read_package(&n, &v2.version).unwrap();
    assert_eq!(hash, v2.version);
    assert_eq!(stored.to_bytes().unwrap(), published);

    let listed = store.versions(&n).unwrap();
    assert_eq!(listed.len(), 2);
    let live: Vec<&str> = listed
        .iter()
        .filter(|v| v.live)
        .map(|v| v.version.as_str())
        .collect();
    assert_eq!(live, vec![v2.version.as_str()]);
    assert_eq!(store.names().unwrap(), vec![n.clone()]);

    let back = store.rollback(&n).unwrap();
    assert_eq!(back.live, v1.version);
    assert!(
        back.previous.is_empty(),
        "rolled-back-from version is not a rollback target"
    );
    assert!(matches!(
        store.rollback(&n),
        Err(StoreError::NothingToRollBack { .. })
    ));
    let again = store.set_live(&n, &v2.version).unwrap();
    assert_eq!(again.live, v2.version);
    assert_eq!(again.previous, vec![v1.version.clone()]);
}

fn republishing_the_same_bytes_writes_nothing_and_flips_nothing(backend: Backend) {
    let store = &backend.store;
    let n = name("a");
    let first = store.publish(&n, bytes(1.0), "v1", None).unwrap();
    let second = store.publish(&n, bytes(1.0), "v1 again", None).unwrap();
    assert_eq!(second.version, first.version);
    assert!(!second.new_file);
    assert_eq!(second.replaced, None, "it was live already");
    assert!(store.pointer(&n).unwrap().unwrap().previous.is_empty());
}

fn retire_is_refused_while_live_and_drops_the_version_from_history(backend: Backend) {
    let store = &backend.store;
    let n = name("a");
    let v1 = store.publish(&n, bytes(1.0), "v1", None).unwrap().version;
    let v2 = store.publish(&n, bytes(2.0), "v2", None).unwrap().version;
    let e = store.retire(&n, &v2).unwrap_err();
    assert!(matches!(e, StoreError::RetireLive { .. }));
    assert!(e.to_string().contains("is live"), "{e}");
    store.retire(&n, &v1).unwrap();
    assert!(!store.has_version(&n, &v1).unwrap());
    assert!(store.pointer(&n).unwrap().unwrap().previous.is_empty());
    assert!(matches!(
        store.rollback(&n),
        Err(StoreError::NothingToRollBack { .. })
    ));
    assert!(matches!(
        store.retire(&n, &v1),
        Err(StoreError::UnknownVersion { .. })
    ));
}

fn unknown_names_versions_and_bad_versions_are_clear_errors(backend: Backend) {
    let store = &backend.store;
    let n = name("nobody");
    let e = store.live(&n).unwrap_err().to_string();
    assert!(e.contains("no adapter \"nobody\""), "{e}");
    store.publish(&n, bytes(1.0), "v1", None).unwrap();
    let e = store
        .set_live(&n, "0000000000000000")
        .unwrap_err()
        .to_string();
    assert!(e.contains("has no version 0000000000000000"), "{e}");
    let e = store.set_live(&n, "../../etc").unwrap_err().to_string();
    assert!(e.contains("is not a version"), "{e}");
}

fn publishing_an_invalid_package_leaves_the_store_untouched(backend: Backend) {
    let store = &backend.store;
    let n = name("a");
    let good = store.publish(&n, bytes(1.0), "v1", Some(&spec())).unwrap();
    let mut other_base = spec();
    other_base.fingerprint = "ffffffffffffffff".to_owned();
    let e = store
        .publish(&n, bytes(2.0), "v2.safetensors", Some(&other_base))
        .unwrap_err();
    assert!(e.to_string().contains("v2.safetensors") && e.to_string().contains("base fingerprint"));
    assert_eq!(store.live(&n).unwrap(), good.version);
    assert_eq!(store.versions(&n).unwrap().len(), 1);
}

// The disk store's own layout.

#[test]
fn a_corrupt_pointer_is_reported_with_its_path_and_line() {
    let (_dir, store) = new_store();
    let n = name("a");
    store.publish(&n, bytes(1.0), "v1", None).unwrap();
    let pointer = store.root().join("a").join(POINTER_FILE);
    std::fs::write(&pointer, "live 1234\n").unwrap();
    let e = store.live(&n).unwrap_err().to_string();
    assert!(
        e.contains(&pointer.display().to_string()) && e.contains("line 1"),
        "{e}"
    );
}

fn show_reads_the_package_metadata(backend: Backend) {
    let store = &backend.store;
    let n = name("a");
    let v = store.publish(&n, bytes(1.5), "v1", None).unwrap().version;
    let details = store.show(&n, &v).unwrap();
    assert!(details.info.live);
    assert_eq!(details.meta.description, "tag 1.5");
    assert_eq!(details.targets, tagged(4, 1.5).targets());
}

fn assert_store_is_whole(store: &Store, n: &AdapterName) {
    let live = store.live(n).unwrap();
    let (_, version) = store.read_package(n, &live).unwrap();
    assert_eq!(version, live, "the live file is whole");
    for v in store.versions(n).unwrap() {
        let (_, version) = store.read_package(n, &v.version).unwrap();
        assert_eq!(version, v.version, "every stored file is whole");
    }
    if store.cache_stats().is_none() {
        for entry in std::fs::read_dir(store.root().join(n.as_str())).unwrap() {
            let file = entry.unwrap().file_name().to_string_lossy().into_owned();
            assert!(
                !file.starts_with(TEMP_PREFIX),
                "temporary file {file} left behind"
            );
        }
    }
}

fn concurrent_publishers_never_leave_a_torn_file_or_a_dangling_pointer(backend: Backend) {
    let store = backend.store.clone();
    let n = name("contended");
    let threads = 8;
    let per_thread = 6;
    let barrier = Arc::new(Barrier::new(threads + 1));
    let mut joins = Vec::new();
    for t in 0..threads {
        let store = store.clone();
        let n = n.clone();
        let barrier = barrier.clone();
        joins.push(std::thread::spawn(move || {
            barrier.wait();
            for i in 0..per_thread {
                let tag = (t * per_thread + i) as f32;
                store.publish(&n, bytes(tag), "concurrent", None).unwrap();
                if i % 3 == 2 {
                    // Rollbacks race the publishes too; either outcome is fine.
                    let _ = store.rollback(&n);
                }
            }
        }));
    }
    let reader = {
        let store = store.clone();
        let n = n.clone();
        std::thread::spawn(move || {
            barrier.wait();
            let mut seen = 0;
            while seen < 200 {
                if let Ok(live) = store.live(&n) {
                    // Whatever the pointer names is stored, whole.
                    let (_, v) = store.read_package(&n, &live).unwrap();
                    assert_eq!(v, live);
                    seen += 1;
                }
            }
        })
    };
    for j in joins {
        j.join().unwrap();
    }
    reader.join().unwrap();
    assert_eq!(store.versions(&n).unwrap().len(), threads * per_thread);
    assert_store_is_whole(&store, &n);
}

/// What one replica publishes, sets live, rolls back or retires, another replica's store on the
/// same backend sees at its next read.
fn two_stores_on_one_backend_see_each_others_changes(backend: Backend) {
    let first = &backend.store;
    let second = match first.cache_stats() {
        None => Store::open(first.root(), Limits::default()).unwrap(),
        Some(_) => {
            let server = backend.server.as_ref().unwrap();
            Store::open_remote(
                &server.config("fleet/store"),
                &backend.dir.path().join("second-cache"),
                64 << 20,
                Limits::default(),
            )
            .unwrap()
        }
    };
    let n = name("shared");
    let v1 = first.publish(&n, bytes(1.0), "v1", None).unwrap().version;
    assert_eq!(second.live(&n).unwrap(), v1);
    assert_eq!(second.names().unwrap(), vec![n.clone()]);
    let v2 = second.publish(&n, bytes(2.0), "v2", None).unwrap();
    assert_eq!(v2.replaced.as_deref(), Some(v1.as_str()));
    assert_eq!(first.live(&n).unwrap(), v2.version);
    let (pkg, _) = first.read_package(&n, &v2.version).unwrap();
    assert_eq!(pkg.meta.description, "tag 2");
    first.rollback(&n).unwrap();
    assert_eq!(second.live(&n).unwrap(), v1);
    second.retire(&n, &v2.version).unwrap();
    assert_eq!(first.versions(&n).unwrap().len(), 1);
}

#[test]
fn bad_names_are_refused_before_touching_the_disk() {
    for bad in ["", "Base", "base", "../x", "a/b", "a.b", &"n".repeat(65)] {
        assert!(AdapterName::new(bad).is_err(), "{bad:?}");
    }
}

/// A process killed mid-write leaves a temporary file in the adapter's folder; the next start
/// removes it (under the adapter's lock) and leaves the versions and the pointer alone.
#[test]
fn unfinished_writes_a_crash_left_are_removed_at_start() {
    let (dir, store) = new_store();
    let n = name("support-bot");
    let v1 = store.publish(&n, bytes(1.0), "v1", Some(&spec())).unwrap();
    let folder = dir.path().join("store/support-bot");
    for leftover in ["4242-0.tmp", "4242-1.tmp"] {
        std::fs::write(
            folder.join(format!("{TEMP_PREFIX}{leftover}")),
            b"half a pack",
        )
        .unwrap();
    }
    // Not an adapter folder: left alone.
    std::fs::write(dir.path().join("store/notes.txt"), b"mine").unwrap();
    assert_eq!(store.remove_unfinished_writes().unwrap(), 2);
    let mut left: Vec<String> = std::fs::read_dir(&folder)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    left.sort();
    assert_eq!(
        left,
        vec![
            ".lock".to_owned(),
            format!("{}.safetensors", v1.version),
            POINTER_FILE.to_owned()
        ]
    );
    assert_eq!(store.live(&n).unwrap(), v1.version);
    assert!(dir.path().join("store/notes.txt").is_file());
    assert_eq!(store.remove_unfinished_writes().unwrap(), 0);
}
