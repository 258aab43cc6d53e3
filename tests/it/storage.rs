//! Object storage at the edges, against an S3-compatible server on loopback
//! (`moto_server` from the `moto[server]` PyPI package; objects are put and
//! listed with boto3, a general-purpose S3 client, as the outside reference):
//! a clip set read from `s3://` decodes to the same frames as the same clips
//! on disk, with scratch emptied afterwards; `publish` uploads with multipart
//! puts and writes the commit marker last; `pull` checks every file and
//! refuses a dataset without a marker.

use std::net::TcpListener;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use crate::util::{require_ffmpeg, require_python, s};

/// A moto S3 server on 127.0.0.1, stopped (by its PID) on drop.
struct Moto {
    child: Child,
    endpoint: String,
}

impl Drop for Moto {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A TCP port free on 127.0.0.1 just now.
fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// Waits (up to 60 s) until `server` accepts connections on 127.0.0.1:`port`.
fn wait_for_port(port: u16, server: &str) {
    let started = Instant::now();
    while std::net::TcpStream::connect(("127.0.0.1", port)).is_err() {
        assert!(
            started.elapsed() < Duration::from_secs(60),
            "{server} did not start"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}

fn start_moto() -> Option<Moto> {
    if !require_python(&["boto3", "moto"]) || !crate::util::require_tool("moto_server", &["--help"])
    {
        return None;
    }
    let port = free_port();
    let child = Command::new("moto_server")
        .args(["-H", "127.0.0.1", "-p", &port.to_string()])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("moto_server starts");
    let moto = Moto {
        child,
        endpoint: format!("http://127.0.0.1:{port}"),
    };
    wait_for_port(port, "moto_server");
    Some(moto)
}

/// Runs boto3 `code` with `s3` bound to a client of the server.
fn boto(m: &Moto, code: &str) -> String {
    let prelude = format!(
        "import boto3, sys\ns3 = boto3.client('s3', endpoint_url='{}', aws_access_key_id='test', \
         aws_secret_access_key='test', region_name='us-east-1')\n",
        m.endpoint
    );
    crate::util::python(&(prelude + code), &[])
}

/// Runs the binary with test credentials in the environment only.
fn actuary_env(args: &[&str]) -> (i32, String, String) {
    crate::util::actuary_with_env(
        args,
        &[
            ("AWS_ACCESS_KEY_ID", "test"),
            ("AWS_SECRET_ACCESS_KEY", "secret-that-must-not-leak"),
            ("AWS_REGION", "us-east-1"),
        ],
    )
}

fn store_table(m: &Moto) -> String {
    format!(
        "[cluster.store]\nendpoint = \"{}\"\nallow-http = true\npart-size-mb = 5.3\n",
        m.endpoint
    )
}

fn walk(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            walk(&p, out)
        } else {
            out.push(p)
        }
    }
}

#[test]
fn clip_set_in_s3_decodes_like_the_same_clips_on_disk() {
    if !require_ffmpeg() {
        return;
    }
    let Some(m) = start_moto() else { return };
    let fx = crate::cluster::fixture(2, 2);
    // boto3 creates the bucket and uploads every clip and sidecar.
    boto(&m, "s3.create_bucket(Bucket='clips')\n");
    let mut local = Vec::new();
    walk(&fx.root.join("clips"), &mut local);
    let uploads: String = local
        .iter()
        .map(|p| {
            let key = p.strip_prefix(&fx.root).unwrap().to_string_lossy();
            format!("s3.upload_file('{}', 'clips', 'lab/{key}')\n", s(p))
        })
        .collect();
    boto(&m, &uploads);
    let scratch = fx.root.join("scratch");
    let local_spec = crate::cluster::write_spec(&fx.root, "local.toml", "run-local", "");
    let text = std::fs::read_to_string(&local_spec).unwrap();
    let remote = text
        .replace("run-local", "run-remote")
        .replace("\"clips/robot\"", "\"s3://clips/lab/clips/robot\"")
        .replace("\"clips/human\"", "\"s3://clips/lab/clips/human\"")
        + &format!(
            "[cluster]\nscratch = \"{}\"\nscratch-limit-gb = 0.001\n",
            s(&scratch)
        )
        + &store_table(&m);
    let remote_spec = fx.root.join("remote.toml");
    std::fs::write(&remote_spec, remote).unwrap();

    let a = actuary_env(&["run", s(&local_spec), "--until", "decode", "-j", "2"]);
    assert_eq!(a.0, 0, "{}", a.2);
    let b = actuary_env(&["run", s(&remote_spec), "--until", "decode", "-j", "2"]);
    assert_eq!(b.0, 0, "{}", b.2);
    let ma: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(fx.root.join("run-local/decode/manifest.json")).unwrap(),
    )
    .unwrap();
    let mb: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(fx.root.join("run-remote/decode/manifest.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(ma["counts"], mb["counts"], "{mb}");
    assert_eq!(mb["counts"]["decoded"], 4, "{mb}");
    // Same frames byte for byte; the records name the object URL, not the scratch copy.
    for (set, id) in [
        ("robot", "r0"),
        ("robot", "r1"),
        ("human", "h0"),
        ("human", "day2/h1"),
    ] {
        let rel = format!("decode/clips/{set}/{id}.frames");
        let fa = std::fs::read(fx.root.join("run-local").join(&rel)).unwrap();
        let fb = std::fs::read(fx.root.join("run-remote").join(&rel)).unwrap();
        assert!(fa == fb, "{rel} differs");
        let rec = std::fs::read_to_string(
            fx.root
                .join("run-remote")
                .join(format!("decode/clips/{set}/{id}.clip.json")),
        )
        .unwrap();
        assert!(
            rec.contains("s3://clips/lab/clips/") && !rec.contains(s(&scratch)),
            "{rec}"
        );
    }
    let mut left = Vec::new();
    if scratch.exists() {
        walk(&scratch, &mut left);
    }
    assert!(left.is_empty(), "scratch not emptied: {left:?}");
    let all = format!(
        "{}{}{}",
        b.1,
        b.2,
        std::fs::read_to_string(fx.root.join("run-remote/decode/manifest.json")).unwrap()
    );
    assert!(!all.contains("secret-that-must-not-leak"));
}

/// A stand-in run folder under `root`: `run/shard/` with a manifest and a 6 MB
/// file (two multipart parts of 5.3 MB at most), an empty `clips/`, and
/// `spec.toml` publishing to `publish` with `store` (a `[cluster.store]`
/// table) appended. Returns the big file's bytes and the spec's path.
fn stand_in_run(root: &Path, publish: &str, store: &str) -> (Vec<u8>, std::path::PathBuf) {
    let shard = root.join("run/shard");
    std::fs::create_dir_all(&shard).unwrap();
    std::fs::write(shard.join("manifest.json"), "{\"stage\": \"shard\"}\n").unwrap();
    let big: Vec<u8> = (0..6_000_000u32)
        .map(|i| (i.wrapping_mul(2654435761) >> 13) as u8)
        .collect();
    std::fs::write(shard.join("shard-00000.parquet"), &big).unwrap();
    std::fs::create_dir_all(root.join("clips")).unwrap();
    let spec = root.join("spec.toml");
    std::fs::write(
        &spec,
        format!(
            "out = \"run\"\n[sets.robot]\ndir = \"clips\"\nlabelled = true\n[cluster]\npublish = \"{publish}\"\n{store}"
        ),
    )
    .unwrap();
    (big, spec)
}

/// Publishing the same dataset again is a no-op; publishing a changed one to
/// the same place is refused (the marker's conditional create). Returns the
/// refused run's output.
fn republish(
    root: &Path,
    spec: &Path,
    run: impl Fn(&[&str]) -> (i32, String, String),
) -> (i32, String, String) {
    let again = run(&["publish", s(spec)]);
    assert!(
        again.0 == 0 && again.1.contains("already published"),
        "{}",
        again.1
    );
    std::fs::write(
        root.join("run/shard/manifest.json"),
        "{\"stage\": \"shard\", \"changed\": true}\n",
    )
    .unwrap();
    let other = run(&["publish", s(spec)]);
    assert!(
        other.0 != 0 && other.2.contains("different dataset is already published"),
        "{}",
        other.2
    );
    other
}

#[test]
fn publish_writes_the_marker_last_and_pull_refuses_a_dataset_without_one() {
    let Some(m) = start_moto() else { return };
    boto(&m, "s3.create_bucket(Bucket='data')\n");
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    let (big, spec) = stand_in_run(root, "s3://data/tabletop/v1", &store_table(&m));
    let out = actuary_env(&["publish", s(&spec)]);
    assert_eq!(out.0, 0, "{}", out.2);
    assert!(out.1.contains("published 2 file(s)"), "{}", out.1);
    // boto3 sees both files, the multipart upload's ETag (`...-2`), and the marker.
    let listing = boto(
        &m,
        "for o in s3.list_objects_v2(Bucket='data', Prefix='tabletop/v1/')['Contents']:\n    print(o['Key'], o['Size'], o['ETag'])\n",
    );
    assert!(
        listing.contains("tabletop/v1/shard-00000.parquet 6000000"),
        "{listing}"
    );
    assert!(
        listing.contains("-2\""),
        "multipart ETag expected: {listing}"
    );
    assert!(
        listing.contains("tabletop/v1/actuary-commit.json"),
        "{listing}"
    );

    let other = republish(root, &spec, actuary_env);

    let dest = root.join("pulled");
    let args = [
        "pull",
        "s3://data/tabletop/v1",
        s(&dest),
        "--endpoint",
        &m.endpoint,
        "--allow-http",
    ];
    let pulled = actuary_env(&args);
    assert_eq!(pulled.0, 0, "{}", pulled.2);
    assert!(std::fs::read(dest.join("shard-00000.parquet")).unwrap() == big);

    // Without the marker (a half-published dataset) the reader refuses.
    boto(
        &m,
        "s3.delete_object(Bucket='data', Key='tabletop/v1/actuary-commit.json')\n",
    );
    let refused = actuary_env(&[
        "pull",
        "s3://data/tabletop/v1",
        s(&root.join("p2")),
        "--endpoint",
        &m.endpoint,
        "--allow-http",
    ]);
    assert_ne!(refused.0, 0);
    assert!(
        refused.2.contains("no commit marker") && refused.2.contains("refusing"),
        "{}",
        refused.2
    );
    assert!(!format!("{}{}{}", out.2, other.2, refused.2).contains("secret-that-must-not-leak"));
}

/// An Azurite blob server (the Azure Storage emulator, npm package `azurite`)
/// on 127.0.0.1, stopped (by its PID) on drop.
struct Azurite {
    child: Child,
    url: String,
    _data: tempfile::TempDir,
}

impl Drop for Azurite {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn start_azurite() -> Option<Azurite> {
    if !require_python(&["azure.storage.blob"])
        || !crate::util::require_tool("azurite-blob", &["--version"])
    {
        return None;
    }
    let port = free_port();
    let data = tempfile::tempdir().unwrap();
    let child = Command::new("azurite-blob")
        .args(["--blobHost", "127.0.0.1", "--blobPort", &port.to_string()])
        .args([
            "--location",
            s(data.path()),
            "--skipApiVersionCheck",
            "--silent",
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("azurite-blob starts");
    let az = Azurite {
        child,
        url: format!("http://127.0.0.1:{port}"),
        _data: data,
    };
    wait_for_port(port, "azurite-blob");
    Some(az)
}

/// Runs `code` with `blobs` bound to the emulator's container `data`, through
/// Microsoft's `azure-storage-blob` client (the outside reference). The account
/// and key are the emulator's published development ones.
fn azure_py(az: &Azurite, code: &str) -> String {
    let prelude = format!(
        "from azure.storage.blob import BlobServiceClient\n\
         conn = ('DefaultEndpointsProtocol=http;AccountName=devstoreaccount1;'\n\
         'AccountKey=Eby8vdM02xNOcqFlqUwJPLlmEtlCDXJ1OUzFT50uSRZ6IFsuFq2UVErCz4I6tq/K1SZFPTOtr/KBHBeksoGMGw==;'\n\
         'BlobEndpoint={}/devstoreaccount1;')\n\
         svc = BlobServiceClient.from_connection_string(conn)\n\
         blobs = svc.get_container_client('data')\n",
        az.url
    );
    crate::util::python(&(prelude + code), &[])
}

/// Runs the binary against the emulator (credentials from the environment only).
fn actuary_azure(az: &Azurite, args: &[&str]) -> (i32, String, String) {
    crate::util::actuary_with_env(
        args,
        &[
            ("AZURE_STORAGE_USE_EMULATOR", "true"),
            ("AZURITE_BLOB_STORAGE_URL", &az.url),
        ],
    )
}

#[test]
fn publish_and_pull_through_azure_blob_storage() {
    // Reference: Azurite, Microsoft's Azure Storage emulator, and Microsoft's
    // azure-storage-blob Python client, which lists what was uploaded.
    let Some(az) = start_azurite() else { return };
    azure_py(&az, "svc.create_container('data')\n");
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    let (big, spec) = stand_in_run(
        root,
        "az://data/tabletop/v1",
        "[cluster.store]\npart-size-mb = 5.3\n",
    );
    let out = actuary_azure(&az, &["publish", s(&spec)]);
    assert_eq!(out.0, 0, "{}", out.2);
    assert!(out.1.contains("published 2 file(s)"), "{}", out.1);
    let listing = azure_py(
        &az,
        "for b in blobs.list_blobs(name_starts_with='tabletop/v1/'):\n    print(b.name, b.size)\n",
    );
    assert!(
        listing.contains("tabletop/v1/shard-00000.parquet 6000000"),
        "{listing}"
    );
    assert!(
        listing.contains("tabletop/v1/actuary-commit.json"),
        "{listing}"
    );
    republish(root, &spec, |a| actuary_azure(&az, a));
    let dest = root.join("pulled");
    let pulled = actuary_azure(&az, &["pull", "az://data/tabletop/v1", s(&dest)]);
    assert_eq!(pulled.0, 0, "{}", pulled.2);
    assert!(std::fs::read(dest.join("shard-00000.parquet")).unwrap() == big);
    azure_py(
        &az,
        "blobs.delete_blob('tabletop/v1/actuary-commit.json')\n",
    );
    let refused = actuary_azure(&az, &["pull", "az://data/tabletop/v1", s(&root.join("p2"))]);
    assert_ne!(refused.0, 0);
    assert!(
        refused.2.contains("no commit marker") && refused.2.contains("refusing"),
        "{}",
        refused.2
    );
}

#[test]
fn gs_url_without_credentials_is_a_clear_error_naming_the_url() {
    // No Google Cloud Storage emulator is available here, so this only checks
    // that gs:// is built in and fails with the URL and the store's reason
    // rather than "not a supported object store URL".
    let tmp = tempfile::tempdir().unwrap();
    let missing = tmp.path().join("missing.json");
    let (code, _, err) = crate::util::actuary_with_env(
        &["pull", "gs://no-such-bucket/x", s(&tmp.path().join("p"))],
        &[("GOOGLE_SERVICE_ACCOUNT", s(&missing))],
    );
    assert_ne!(code, 0);
    assert!(err.contains("gs://no-such-bucket/x"), "{err}");
    assert!(!err.contains("not a supported object store URL"), "{err}");
}
