//! The on-disk store: publish, list, show, set live, rollback and retire as a user sees them, the
//! name rules, and concurrent publishers that must never leave a torn file or a pointer to a
//! version that is not there.

mod common;

use std::path::Path;
use std::sync::{Arc, Barrier};

use switchyard_adapters::package::{Limits, content_version};
use switchyard_adapters::store::{POINTER_FILE, Store, StoreError, TEMP_PREFIX};
use switchyard_adapters::{AdapterName, AdapterPackage, PackageBytes};

use common::{spec, tagged};

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

#[test]
fn publish_makes_the_version_live_and_keeps_history_for_rollback() {
    let (_dir, store) = new_store();
    let n = name("support-bot");
    let v1 = store.publish(&n, bytes(1.0), "v1", Some(&spec())).unwrap();
    assert_eq!(v1.replaced, None);
    assert!(v1.new_file);
    let v2 = store.publish(&n, bytes(2.0), "v2", Some(&spec())).unwrap();
    assert_eq!(v2.replaced.as_deref(), Some(v1.version.as_str()));
    assert_eq!(store.live(&n).unwrap(), v2.version);

    // The version is the content hash of the stored file, and the file is the package.
    let path = store.version_path(&n, &v2.version).unwrap();
    let on_disk = std::fs::read(&path).unwrap();
    assert_eq!(content_version(&on_disk), v2.version);
    assert_eq!(on_disk, tagged(4, 2.0).to_bytes().unwrap());

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

#[test]
fn republishing_the_same_bytes_writes_nothing_and_flips_nothing() {
    let (_dir, store) = new_store();
    let n = name("a");
    let first = store.publish(&n, bytes(1.0), "v1", None).unwrap();
    let second = store.publish(&n, bytes(1.0), "v1 again", None).unwrap();
    assert_eq!(second.version, first.version);
    assert!(!second.new_file);
    assert_eq!(second.replaced, None, "it was live already");
    assert!(store.pointer(&n).unwrap().unwrap().previous.is_empty());
}

#[test]
fn retire_is_refused_while_live_and_drops_the_version_from_history() {
    let (_dir, store) = new_store();
    let n = name("a");
    let v1 = store.publish(&n, bytes(1.0), "v1", None).unwrap().version;
    let v2 = store.publish(&n, bytes(2.0), "v2", None).unwrap().version;
    let e = store.retire(&n, &v2).unwrap_err();
    assert!(matches!(e, StoreError::RetireLive { .. }));
    assert!(e.to_string().contains("is live"), "{e}");
    store.retire(&n, &v1).unwrap();
    assert!(!store.version_path(&n, &v1).unwrap().exists());
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

#[test]
fn unknown_names_versions_and_bad_versions_are_clear_errors() {
    let (_dir, store) = new_store();
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

#[test]
fn publishing_an_invalid_package_leaves_the_store_untouched() {
    let (_dir, store) = new_store();
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

#[test]
fn show_reads_the_package_metadata() {
    let (_dir, store) = new_store();
    let n = name("a");
    let v = store.publish(&n, bytes(1.5), "v1", None).unwrap().version;
    let details = store.show(&n, &v).unwrap();
    assert!(details.info.live);
    assert_eq!(details.meta.description, "tag 1.5");
    assert_eq!(details.targets, tagged(4, 1.5).targets());
}

fn assert_store_is_whole(store: &Store, n: &AdapterName, dir: &Path) {
    let live = store.live(n).unwrap();
    let path = store.version_path(n, &live).unwrap();
    let (_, version) = AdapterPackage::read(&path, &Limits::default()).unwrap();
    assert_eq!(version, live, "the live file is whole");
    for v in store.versions(n).unwrap() {
        let p = store.version_path(n, &v.version).unwrap();
        let (_, version) = AdapterPackage::read(&p, &Limits::default()).unwrap();
        assert_eq!(version, v.version, "every stored file is whole");
    }
    for entry in std::fs::read_dir(dir.join(n.as_str())).unwrap() {
        let file = entry.unwrap().file_name().to_string_lossy().into_owned();
        assert!(
            !file.starts_with(TEMP_PREFIX),
            "temporary file {file} left behind"
        );
    }
}

#[test]
fn concurrent_publishers_never_leave_a_torn_file_or_a_dangling_pointer() {
    let (_dir, store) = new_store();
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
                    // Whatever the pointer names is on disk, whole.
                    let p = store.version_path(&n, &live).unwrap();
                    let (_, v) = AdapterPackage::read(&p, &Limits::default()).unwrap();
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
    assert_store_is_whole(&store, &n, store.root());
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
