//! A full disk during an upload, through the real server: the store lives on a small tmpfs the
//! test mounts (the tests run as root in CI; where mounting is not permitted the test fails and
//! says why, it never passes without having run). The upload is refused with 507 `store_full`,
//! the store's files are exactly as before (no partial version file, no temporary file, no empty
//! adapter folder), and the server goes on serving; once space is freed the same upload works.

use std::collections::BTreeMap;
use std::hash::{DefaultHasher, Hash, Hasher};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::json;
use switchyard_tests::fixtures;
use switchyard_tests::server::{Auth, ServerSetup};

/// The tmpfs: room for the experiment database, one stored version and the filler.
const TMPFS_SIZE: &str = "4m";
/// Space left free before the upload: less than the package (297 kB), so the write fails midway.
const LEFT_FREE: u64 = 96 * 1024;

/// A mounted tmpfs, unmounted on drop.
struct Mount(PathBuf);

impl Mount {
    fn tmpfs(at: &Path) -> Mount {
        std::fs::create_dir_all(at).unwrap();
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={TMPFS_SIZE}"), "tmpfs"])
            .arg(at)
            .output()
            .expect("run mount");
        assert!(
            out.status.success(),
            "THIS TEST DID NOT RUN: it needs to mount a {TMPFS_SIZE} tmpfs at {} to make a full disk \
             (run it as root, as CI does, or in a container allowed to mount). mount said: {}",
            at.display(),
            String::from_utf8_lossy(&out.stderr).trim()
        );
        Mount(at.to_owned())
    }
}

impl Drop for Mount {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg("-l").arg(&self.0).status();
    }
}

/// Every file under `dir` with its length and a hash of its bytes (folders with none), except the
/// experiment database, which the server writes on its own schedule.
fn snapshot(dir: &Path) -> BTreeMap<String, (u64, u64)> {
    let mut files = BTreeMap::new();
    let mut stack = vec![dir.to_owned()];
    while let Some(d) = stack.pop() {
        for entry in std::fs::read_dir(&d).unwrap().flatten() {
            let path = entry.path();
            let rel = path
                .strip_prefix(dir)
                .unwrap()
                .to_string_lossy()
                .into_owned();
            if path.is_dir() {
                files.insert(format!("{rel}/"), (0, 0));
                stack.push(path);
            } else if !rel.starts_with("experiments.sqlite") {
                let bytes = std::fs::read(&path).unwrap();
                let mut hasher = DefaultHasher::new();
                bytes.hash(&mut hasher);
                files.insert(rel, (bytes.len() as u64, hasher.finish()));
            }
        }
    }
    files
}

/// Fills the file system of `dir` up to `LEFT_FREE` bytes with one file, and returns it.
fn fill(dir: &Path) -> PathBuf {
    let filler = dir.join("filler");
    let mut f = std::fs::File::create(&filler).unwrap();
    let block = vec![0x5a; 64 * 1024];
    while f.write_all(&block).is_ok() {}
    drop(f);
    let len = std::fs::metadata(&filler).unwrap().len();
    std::fs::OpenOptions::new()
        .write(true)
        .open(&filler)
        .unwrap()
        .set_len(len.saturating_sub(LEFT_FREE))
        .unwrap();
    filler
}

#[test]
fn upload_to_a_full_disk_is_507_store_full_and_leaves_the_store_as_it_was() {
    let root = tempfile::tempdir().unwrap();
    let store = root.path().join("store");
    let _mount = Mount::tmpfs(&store);
    let server = ServerSetup::encoder()
        .set("store", "dir", &format!("{store:?}"))
        .start();
    let small = fixtures().join("minilm-qv-b.safetensors");
    let big = std::fs::read(fixtures().join("minilm-qv-a.safetensors")).unwrap();
    let v1 = server.publish("tone", &small);

    let filler = fill(&store);
    let before = snapshot(&store);
    // A new version of an adapter that exists, and a first version of a new one.
    for name in ["tone", "fresh-tone"] {
        let reply = server.upload(name, &big);
        reply.assert_error(507, "store_full");
        let message = reply.json()["error"]["message"]
            .as_str()
            .unwrap()
            .to_owned();
        assert!(message.contains("No space left"), "{message}");
        assert_eq!(snapshot(&store), before, "{name}: the store changed");
    }

    // Still serving, from the version that was live.
    let body = server
        .embed(json!({"adapter": "tone"}), &["brake bleed"])
        .ok_json();
    assert_eq!(body["served_by"], json!(format!("tone@{v1}")));
    let listed = server.get("/admin/adapters", Auth::Admin).ok_json();
    assert_eq!(listed["adapters"].as_array().unwrap().len(), 1, "{listed}");
    assert_eq!(server.get("/health/ready", Auth::None).status, 200);

    std::fs::remove_file(filler).unwrap();
    let reply = server.upload("tone", &big);
    assert_eq!(reply.status, 201, "{}", reply.body);
    drop(server);
}
