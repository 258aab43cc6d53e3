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

fn start_moto() -> Option<Moto> {
    if !require_python(&["boto3", "moto"]) || !crate::util::require_tool("moto_server", &["--help"])
    {
        return None;
    }
    let port = TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
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
    let started = Instant::now();
    while std::net::TcpStream::connect(("127.0.0.1", port)).is_err() {
        assert!(
            started.elapsed() < Duration::from_secs(60),
            "moto_server did not start"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
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
    let out = Command::new(env!("CARGO_BIN_EXE_actuary"))
        .args(args)
        .env("ACTUARY_QUIET", "1")
        .env("AWS_ACCESS_KEY_ID", "test")
        .env("AWS_SECRET_ACCESS_KEY", "secret-that-must-not-leak")
        .env("AWS_REGION", "us-east-1")
        .output()
        .expect("actuary runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
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
    assert_eq!(ma["counts"], mb["counts"]);
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

#[test]
fn publish_writes_the_marker_last_and_pull_refuses_a_dataset_without_one() {
    let Some(m) = start_moto() else { return };
    boto(&m, "s3.create_bucket(Bucket='data')\n");
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    // A stand-in shard folder: a manifest and a 6 MB file (two multipart parts of 5.3 MB max).
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
            "out = \"run\"\n[sets.robot]\ndir = \"clips\"\nlabelled = true\n[cluster]\npublish = \"s3://data/tabletop/v1\"\n{}",
            store_table(&m)
        ),
    )
    .unwrap();
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

    let again = actuary_env(&["publish", s(&spec)]);
    assert!(
        again.0 == 0 && again.1.contains("already published"),
        "{}",
        again.1
    );
    std::fs::write(
        shard.join("manifest.json"),
        "{\"stage\": \"shard\", \"changed\": true}\n",
    )
    .unwrap();
    let other = actuary_env(&["publish", s(&spec)]);
    assert!(
        other.0 != 0 && other.2.contains("different dataset is already published"),
        "{}",
        other.2
    );

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
