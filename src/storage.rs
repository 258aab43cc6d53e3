//! Object storage at the edges of a run (through the `object_store` crate):
//! clip sets listed and fetched from `s3://`, `gs://`, `az://` or `file://`
//! locations, and finished shards published to one.
//!
//! - Listing: a set whose `dir` is a URL is listed remotely; each clip's
//!   `path` is then the object's URL and its fingerprint is the sha256 of the
//!   object's URL, size and ETag (the bytes are not read at listing time).
//! - Fetching: the decode stage asks [`local_copy`] for a node-local file;
//!   remote objects are streamed into the scratch folder, at most the
//!   configured number of bytes at once ([`configure_scratch`]), and removed
//!   when the copy is dropped.
//! - Publishing: [`publish`] uploads every file of a local folder with
//!   multipart puts and then writes the commit marker [`COMMIT_MARKER`] with a
//!   conditional create, so a reader that checks the marker
//!   ([`open_published`]) never sees a half-published dataset.
//!
//! Credentials come only from the environment (`AWS_ACCESS_KEY_ID`,
//! `AWS_SECRET_ACCESS_KEY`, `AWS_SESSION_TOKEN`, `GOOGLE_APPLICATION_CREDENTIALS`,
//! `AZURE_STORAGE_ACCOUNT_NAME`, `AZURE_STORAGE_ACCOUNT_KEY`, ...); nothing
//! here writes them anywhere, and errors name only the URL.

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Condvar, Mutex, OnceLock};

use futures_util::StreamExt;
use object_store::path::Path as ObjPath;
use object_store::{ObjectStore, ObjectStoreExt, PutMode, PutOptions, PutPayload, WriteMultipart};
use serde::{Deserialize, Serialize};

use crate::inputs::{ClipInput, is_clip};
use crate::spec::SetSpec;
use crate::spec::cluster::{StoreOptions, is_store_url};

/// Name of the commit marker written last at a published location.
pub const COMMIT_MARKER: &str = "actuary-commit.json";

/// Errors talking to an object store.
#[derive(Debug, thiserror::Error)]
pub enum StorageError {
    /// The URL is not one this build can reach.
    #[error(
        "{url}: not a supported object store URL (use s3://BUCKET/PREFIX, gs://, az:// or file:///PATH)"
    )]
    BadUrl {
        /// The URL.
        url: String,
    },
    /// The store could not be set up or a request failed.
    #[error("{url}: {source}")]
    Store {
        /// The object's or prefix's URL.
        url: String,
        /// The cause.
        #[source]
        source: object_store::Error,
    },
    /// A local file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// An object does not fit in the scratch limit at all.
    #[error(
        "{url}: {bytes} bytes do not fit in the scratch limit of {limit} bytes (raise `cluster.scratch-limit-gb`)"
    )]
    TooLarge {
        /// The object.
        url: String,
        /// Its size.
        bytes: u64,
        /// The limit.
        limit: u64,
    },
    /// The dataset has no commit marker: it is incomplete or still being published.
    #[error(
        "{url}: no commit marker `{COMMIT_MARKER}`: the dataset is incomplete or still being published; refusing to read it"
    )]
    NotCommitted {
        /// The dataset location.
        url: String,
    },
    /// A different dataset is already published at this location.
    #[error(
        "{url}: a different dataset is already published here (its `{COMMIT_MARKER}` lists other files); choose a new location"
    )]
    AlreadyPublished {
        /// The dataset location.
        url: String,
    },
    /// A file's content does not match the commit marker.
    #[error("{url}: sha256 {got} does not match the commit marker's {expected}")]
    Checksum {
        /// The object.
        url: String,
        /// From the marker.
        expected: String,
        /// Computed.
        got: String,
    },
    /// The commit marker could not be parsed.
    #[error("{url}: bad commit marker: {reason}")]
    BadMarker {
        /// The marker's URL.
        url: String,
        /// Why.
        reason: String,
    },
}

/// Whether `path` holds an object store URL rather than a local path.
pub fn path_is_url(path: &Path) -> bool {
    path.to_str().is_some_and(is_store_url)
}

/// The shared async runtime of all object store calls.
fn runtime() -> &'static tokio::runtime::Runtime {
    static RT: OnceLock<tokio::runtime::Runtime> = OnceLock::new();
    RT.get_or_init(|| {
        tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .thread_name("actuary-store")
            .enable_all()
            .build()
            .expect("the object store runtime starts")
    })
}

/// A location in an object store: the store and a prefix inside it.
#[derive(Clone)]
pub struct Location {
    store: Arc<dyn ObjectStore>,
    prefix: ObjPath,
    /// The URL without a trailing `/`.
    pub url: String,
    part_size: usize,
}

impl std::fmt::Debug for Location {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        // Never print the store itself: its builder may hold credentials.
        f.debug_struct("Location").field("url", &self.url).finish()
    }
}

/// Store options set once per process (the spec's `[cluster.store]`).
fn store_options() -> &'static Mutex<StoreOptions> {
    static OPTS: OnceLock<Mutex<StoreOptions>> = OnceLock::new();
    OPTS.get_or_init(|| Mutex::new(crate::spec::ClusterOptions::default().store))
}

/// Sets the connection options used by URL listings and fetches in this process.
pub fn configure_store(opts: &StoreOptions) {
    *store_options().lock().unwrap() = opts.clone();
}

fn store_err(url: &str) -> impl FnOnce(object_store::Error) -> StorageError + '_ {
    move |source| StorageError::Store {
        url: url.to_string(),
        source,
    }
}

/// Opens `url` (`s3://bucket/prefix`, `gs://...`, `az://container/prefix`, `file:///abs/path`).
pub fn open(url: &str, opts: &StoreOptions) -> Result<Location, StorageError> {
    let url = url.trim_end_matches('/').to_string();
    let bad = || StorageError::BadUrl { url: url.clone() };
    let (scheme, rest) = url.split_once("://").ok_or_else(bad)?;
    let (store, prefix): (Arc<dyn ObjectStore>, &str) = match scheme {
        "file" => {
            if !rest.starts_with('/') {
                return Err(bad());
            }
            std::fs::create_dir_all(rest).map_err(|source| StorageError::Io {
                path: PathBuf::from(rest),
                source,
            })?;
            let fs = object_store::local::LocalFileSystem::new_with_prefix(rest)
                .map_err(store_err(&url))?;
            (Arc::new(fs), "")
        }
        "s3" => {
            let (bucket, prefix) = rest.split_once('/').unwrap_or((rest, ""));
            if bucket.is_empty() {
                return Err(bad());
            }
            let mut b = object_store::aws::AmazonS3Builder::from_env().with_bucket_name(bucket);
            if let Some(e) = &opts.endpoint {
                b = b
                    .with_endpoint(e)
                    .with_virtual_hosted_style_request(opts.virtual_hosted);
            }
            if let Some(r) = &opts.region {
                b = b.with_region(r);
            }
            if opts.allow_http {
                b = b.with_allow_http(true);
            }
            (Arc::new(b.build().map_err(store_err(&url))?), prefix)
        }
        "gs" => {
            let (bucket, prefix) = rest.split_once('/').unwrap_or((rest, ""));
            if bucket.is_empty() {
                return Err(bad());
            }
            // Credentials and endpoint from GOOGLE_* variables (object_store's from_env).
            let b =
                object_store::gcp::GoogleCloudStorageBuilder::from_env().with_bucket_name(bucket);
            (Arc::new(b.build().map_err(store_err(&url))?), prefix)
        }
        "az" | "abfs" => {
            let (container, prefix) = rest.split_once('/').unwrap_or((rest, ""));
            if container.is_empty() {
                return Err(bad());
            }
            // Account, key and emulator switch from AZURE_* variables (object_store's
            // from_env); `AZURE_STORAGE_USE_EMULATOR=true` targets a local Azurite.
            let mut b = object_store::azure::MicrosoftAzureBuilder::from_env()
                .with_container_name(container);
            if opts.allow_http {
                b = b.with_allow_http(true);
            }
            (Arc::new(b.build().map_err(store_err(&url))?), prefix)
        }
        _ => return Err(bad()),
    };
    Ok(Location {
        store,
        prefix: ObjPath::from(prefix),
        url,
        part_size: opts.part_size.max(5 << 20),
    })
}

impl Location {
    /// The object `name` (relative, `/`-separated) under the prefix.
    pub fn child(&self, name: &str) -> ObjPath {
        name.split('/')
            .filter(|p| !p.is_empty())
            .fold(self.prefix.clone(), |p, part| p.clone().join(part))
    }

    /// The URL of object `name`.
    pub fn url_of(&self, name: &str) -> String {
        format!("{}/{}", self.url, name.trim_start_matches('/'))
    }

    /// Every object under the prefix: (relative name, size, ETag), sorted by name.
    pub fn list(&self) -> Result<Vec<(String, u64, Option<String>)>, StorageError> {
        let prefix = (!self.prefix.as_ref().is_empty()).then_some(&self.prefix);
        let mut out = runtime().block_on(async {
            let mut stream = self.store.list(prefix);
            let mut out = Vec::new();
            while let Some(meta) = stream.next().await {
                let meta = meta.map_err(store_err(&self.url))?;
                let full = meta.location.as_ref();
                let rel = match self.prefix.as_ref() {
                    "" => full.to_string(),
                    p => full
                        .strip_prefix(p)
                        .unwrap_or(full)
                        .trim_start_matches('/')
                        .to_string(),
                };
                out.push((rel, meta.size, meta.e_tag));
            }
            Ok::<_, StorageError>(out)
        })?;
        out.sort();
        Ok(out)
    }

    /// Reads object `name` whole; `Ok(None)` when it does not exist.
    pub fn read(&self, name: &str) -> Result<Option<Vec<u8>>, StorageError> {
        let url = self.url_of(name);
        runtime().block_on(async {
            match self.store.get(&self.child(name)).await {
                Ok(r) => Ok(Some(r.bytes().await.map_err(store_err(&url))?.to_vec())),
                Err(object_store::Error::NotFound { .. }) => Ok(None),
                Err(e) => Err(store_err(&url)(e)),
            }
        })
    }

    /// Streams object `name` into local file `dest` (written under a temporary name, then renamed).
    pub fn download(&self, name: &str, dest: &Path) -> Result<u64, StorageError> {
        use std::io::Write;
        let url = self.url_of(name);
        let io = |path: &Path| {
            let path = path.to_path_buf();
            move |source| StorageError::Io { path, source }
        };
        let mut file = crate::store::AtomicFile::create(dest).map_err(io(dest))?;
        let bytes = runtime().block_on(async {
            let r = self
                .store
                .get(&self.child(name))
                .await
                .map_err(store_err(&url))?;
            let mut stream = r.into_stream();
            let mut n = 0u64;
            while let Some(chunk) = stream.next().await {
                let chunk = chunk.map_err(store_err(&url))?;
                file.write_all(&chunk).map_err(io(dest))?;
                n += chunk.len() as u64;
            }
            Ok::<_, StorageError>(n)
        })?;
        file.commit().map_err(io(dest))?;
        Ok(bytes)
    }

    /// Uploads local file `src` as object `name` with a multipart put.
    pub fn upload(&self, src: &Path, name: &str) -> Result<u64, StorageError> {
        use std::io::Read;
        let url = self.url_of(name);
        let io = |source| StorageError::Io {
            path: src.to_path_buf(),
            source,
        };
        let mut file = std::fs::File::open(src).map_err(io)?;
        runtime().block_on(async {
            let upload = self
                .store
                .put_multipart(&self.child(name))
                .await
                .map_err(store_err(&url))?;
            let mut writer = WriteMultipart::new_with_chunk_size(upload, self.part_size);
            let mut buf = vec![0u8; 1 << 20];
            let mut n = 0u64;
            loop {
                let got = file.read(&mut buf).map_err(io)?;
                if got == 0 {
                    break;
                }
                writer.wait_for_capacity(4).await.map_err(store_err(&url))?;
                writer.write(&buf[..got]);
                n += got as u64;
            }
            writer.finish().await.map_err(store_err(&url))?;
            Ok(n)
        })
    }

    /// Writes `bytes` as object `name` only if it does not exist yet;
    /// `Ok(false)` when it already existed.
    pub fn create(&self, name: &str, bytes: Vec<u8>) -> Result<bool, StorageError> {
        let url = self.url_of(name);
        runtime().block_on(async {
            let opts = PutOptions {
                mode: PutMode::Create,
                ..PutOptions::default()
            };
            match self
                .store
                .put_opts(&self.child(name), PutPayload::from(bytes), opts)
                .await
            {
                Ok(_) => Ok(true),
                Err(object_store::Error::AlreadyExists { .. }) => Ok(false),
                Err(e) => Err(store_err(&url)(e)),
            }
        })
    }
}

/// A location for `url` with the process's store options, opened once and shared.
fn shared_location(url: &str) -> Result<Location, StorageError> {
    static CACHE: OnceLock<Mutex<HashMap<String, Location>>> = OnceLock::new();
    let (scheme, rest) = url
        .split_once("://")
        .ok_or_else(|| StorageError::BadUrl { url: url.into() })?;
    let root = match scheme {
        "file" => "file:///".to_string(),
        _ => format!("{scheme}://{}", rest.split('/').next().unwrap_or("")),
    };
    let mut cache = CACHE.get_or_init(Default::default).lock().unwrap();
    if let Some(l) = cache.get(&root) {
        return Ok(l.clone());
    }
    let l = open(&root, &store_options().lock().unwrap())?;
    cache.insert(root, l.clone());
    Ok(l)
}

/// Splits an object URL into its store root and the object's name.
fn object_name(url: &str) -> Result<(Location, String), StorageError> {
    let loc = shared_location(url)?;
    let name = url
        .strip_prefix(&loc.url)
        .unwrap_or(url)
        .trim_start_matches('/')
        .to_string();
    Ok((loc, name))
}

/// Fingerprints of listed objects (sha256 of URL, size and ETag), by URL.
fn fingerprints() -> &'static Mutex<HashMap<String, String>> {
    static F: OnceLock<Mutex<HashMap<String, String>>> = OnceLock::new();
    F.get_or_init(Default::default)
}

/// The fingerprint of a listed object URL (see the module docs).
pub fn fingerprint(url: &str) -> Option<String> {
    fingerprints().lock().unwrap().get(url).cloned()
}

/// Sizes of listed objects, by URL (for the scratch budget).
fn sizes() -> &'static Mutex<HashMap<String, u64>> {
    static S: OnceLock<Mutex<HashMap<String, u64>>> = OnceLock::new();
    S.get_or_init(Default::default)
}

/// The clips of a set whose `dir` is a URL, sorted by id (same ids and
/// sidecar rules as a local folder).
pub fn list_set(set: &SetSpec) -> Result<Vec<ClipInput>, StorageError> {
    let url = set.dir.to_string_lossy().trim_end_matches('/').to_string();
    let (root, prefix) = object_name(&url)?;
    let prefix_url = root.url_of(&prefix);
    let loc = Location {
        prefix: root.child(&prefix),
        url: prefix_url.clone(),
        ..root
    };
    let objects = loc.list()?;
    let names: BTreeMap<&str, (u64, Option<&String>)> = objects
        .iter()
        .map(|(n, s, e)| (n.as_str(), (*s, e.as_ref())))
        .collect();
    let mut clips = Vec::new();
    for (name, size, etag) in &objects {
        if !is_clip(Path::new(name)) {
            continue;
        }
        let stem = Path::new(name)
            .with_extension("")
            .to_string_lossy()
            .into_owned();
        let sidecar = if set.labelled {
            ["actions.csv", "actions.parquet"]
                .iter()
                .map(|ext| format!("{stem}.{ext}"))
                .find(|n| names.contains_key(n.as_str()))
        } else {
            None
        };
        let remember = |n: &str, size: u64, etag: Option<&String>| {
            let u = loc.url_of(n);
            let fp = crate::util::sha256_json(&(&u, size, etag));
            fingerprints().lock().unwrap().insert(u.clone(), fp);
            sizes().lock().unwrap().insert(u.clone(), size);
            u
        };
        let path = remember(name, *size, etag.as_ref());
        let sidecar = sidecar.map(|n| {
            let (s, e) = names[n.as_str()];
            PathBuf::from(remember(&n, s, e))
        });
        clips.push(ClipInput {
            set: set.name.clone(),
            labelled: set.labelled,
            id: stem,
            path: PathBuf::from(path),
            sidecar,
        });
    }
    clips.sort_by(|a, b| a.id.cmp(&b.id));
    Ok(clips)
}

/// The node-local scratch space for fetched objects: a folder and a byte budget.
struct Scratch {
    dir: PathBuf,
    limit: u64,
    used: Mutex<ScratchUse>,
    freed: Condvar,
}

/// What scratch holds now: bytes reserved and copies not yet dropped
/// (a copy counts from its reservation, before its download starts).
#[derive(Default)]
struct ScratchUse {
    bytes: u64,
    copies: usize,
}

fn scratch() -> &'static Mutex<Arc<Scratch>> {
    static S: OnceLock<Mutex<Arc<Scratch>>> = OnceLock::new();
    S.get_or_init(|| {
        Mutex::new(Arc::new(new_scratch(
            None,
            crate::spec::ClusterOptions::default().scratch_limit_bytes,
        )))
    })
}

fn new_scratch(dir: Option<&Path>, limit: u64) -> Scratch {
    let base = dir.map(Path::to_path_buf).unwrap_or_else(|| {
        std::env::var_os("SLURM_TMPDIR")
            .or_else(|| std::env::var_os("TMPDIR"))
            .map(PathBuf::from)
            .unwrap_or_else(|| PathBuf::from("/tmp"))
    });
    Scratch {
        dir: base.join(format!("actuary-scratch-{}", std::process::id())),
        limit,
        used: Mutex::new(ScratchUse::default()),
        freed: Condvar::new(),
    }
}

/// Sets the scratch folder (`None`: `$SLURM_TMPDIR`, `$TMPDIR` or `/tmp`)
/// and the most bytes fetched at once, for this process.
pub fn configure_scratch(dir: Option<&Path>, limit_bytes: u64) {
    *scratch().lock().unwrap() = Arc::new(new_scratch(dir, limit_bytes));
}

/// A node-local file for a clip or sidecar: the file itself when local, else
/// a copy in scratch that is removed (and its bytes released) on drop.
pub struct LocalCopy {
    path: PathBuf,
    fetched: Option<(Arc<Scratch>, u64)>,
}

impl LocalCopy {
    /// The local file.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

impl Drop for LocalCopy {
    fn drop(&mut self) {
        if let Some((s, bytes)) = self.fetched.take() {
            let _ = std::fs::remove_file(&self.path);
            let mut used = s.used.lock().unwrap();
            used.bytes -= bytes;
            used.copies -= 1;
            // Only the last copy removes the folder, under the lock: another
            // copy's download may be creating it between reservation and file.
            if used.copies == 0 {
                let _ = std::fs::remove_dir(&s.dir);
            }
            drop(used);
            s.freed.notify_all();
        }
    }
}

/// Waits until `size` more bytes fit in scratch `s`, then reserves them
/// for a copy named `file_name` (not yet written; dropping it releases them).
fn reserve(s: &Arc<Scratch>, size: u64, file_name: &str) -> LocalCopy {
    let mut used = s.used.lock().unwrap();
    while used.bytes + size > s.limit {
        used = s.freed.wait(used).unwrap();
    }
    used.bytes += size;
    used.copies += 1;
    LocalCopy {
        path: s.dir.join(file_name),
        fetched: Some((s.clone(), size)),
    }
}

/// A local file for `path`: itself, or a scratch copy when it is a URL
/// (waiting until the scratch budget has room).
pub fn local_copy(path: &Path) -> Result<LocalCopy, StorageError> {
    if !path_is_url(path) {
        return Ok(LocalCopy {
            path: path.to_path_buf(),
            fetched: None,
        });
    }
    let url = path.to_string_lossy().into_owned();
    let (loc, name) = object_name(&url)?;
    let size = match sizes().lock().unwrap().get(&url) {
        Some(s) => *s,
        None => {
            runtime()
                .block_on(loc.store.head(&loc.child(&name)))
                .map_err(store_err(&url))?
                .size
        }
    };
    let s = scratch().lock().unwrap().clone();
    if size > s.limit {
        return Err(StorageError::TooLarge {
            url,
            bytes: size,
            limit: s.limit,
        });
    }
    let file_name = format!(
        "{}-{}",
        &crate::util::sha256_hex(url.as_bytes())[..16],
        Path::new(&name)
            .file_name()
            .map_or("clip".into(), |n| n.to_string_lossy())
    );
    let copy = reserve(&s, size, &file_name);
    loc.download(&name, &copy.path)?;
    Ok(copy)
}

/// One file of a published dataset, as listed in the commit marker.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct PublishedFile {
    /// File name under the location.
    pub name: String,
    /// Size in bytes.
    pub bytes: u64,
    /// sha256, lowercase hex.
    pub sha256: String,
}

/// The commit marker's content.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct CommitMarker {
    /// actuary version that published.
    pub tool_version: String,
    /// Every file, in name order.
    pub files: Vec<PublishedFile>,
}

/// What [`publish`] did.
#[derive(Debug, Clone, Serialize)]
pub struct PublishReport {
    /// The location.
    pub url: String,
    /// Files uploaded now.
    pub uploaded: usize,
    /// Bytes uploaded now.
    pub bytes: u64,
    /// True when the same dataset was already published there.
    pub already: bool,
}

/// The files of `dir` to publish (plain files, not temporary ones), in name order.
fn publishable(dir: &Path) -> Result<Vec<PublishedFile>, StorageError> {
    let io = |path: &Path| {
        let path = path.to_path_buf();
        move |source| StorageError::Io { path, source }
    };
    let mut out = Vec::new();
    for entry in std::fs::read_dir(dir).map_err(io(dir))? {
        let entry = entry.map_err(io(dir))?;
        let path = entry.path();
        let name = entry.file_name().to_string_lossy().into_owned();
        if !entry.file_type().map_err(io(&path))?.is_file() || name.ends_with(".tmp") {
            continue;
        }
        out.push(PublishedFile {
            bytes: entry.metadata().map_err(io(&path))?.len(),
            sha256: crate::util::sha256_file(&path).map_err(io(&path))?,
            name,
        });
    }
    out.sort_by(|a, b| a.name.cmp(&b.name));
    Ok(out)
}

/// Uploads every file of `dir` (the shards and their `manifest.json`) to `url`
/// with multipart puts, then the commit marker with a conditional create.
/// Publishing the same files again is a no-op; publishing other files where
/// a dataset is already committed is refused.
pub fn publish(dir: &Path, url: &str, opts: &StoreOptions) -> Result<PublishReport, StorageError> {
    let loc = open(url, opts)?;
    let files = publishable(dir)?;
    let marker = CommitMarker {
        tool_version: crate::VERSION.to_string(),
        files,
    };
    let same = |bytes: &[u8]| -> Result<bool, StorageError> {
        let old: CommitMarker =
            serde_json::from_slice(bytes).map_err(|e| StorageError::BadMarker {
                url: loc.url_of(COMMIT_MARKER),
                reason: e.to_string(),
            })?;
        Ok(old.files == marker.files)
    };
    let done = |already| PublishReport {
        url: loc.url.clone(),
        uploaded: if already { 0 } else { marker.files.len() },
        bytes: if already {
            0
        } else {
            marker.files.iter().map(|f| f.bytes).sum()
        },
        already,
    };
    if let Some(existing) = loc.read(COMMIT_MARKER)? {
        return if same(&existing)? {
            Ok(done(true))
        } else {
            Err(StorageError::AlreadyPublished {
                url: loc.url.clone(),
            })
        };
    }
    for f in &marker.files {
        loc.upload(&dir.join(&f.name), &f.name)?;
    }
    let mut bytes = serde_json::to_vec_pretty(&marker).expect("marker serialises");
    bytes.push(b'\n');
    if loc.create(COMMIT_MARKER, bytes)? {
        Ok(done(false))
    } else {
        // Someone committed between our check and our marker.
        let existing = loc.read(COMMIT_MARKER)?.unwrap_or_default();
        if same(&existing)? {
            Ok(done(true))
        } else {
            Err(StorageError::AlreadyPublished {
                url: loc.url.clone(),
            })
        }
    }
}

/// Opens a published dataset: its commit marker, or [`StorageError::NotCommitted`].
pub fn open_published(
    url: &str,
    opts: &StoreOptions,
) -> Result<(Location, CommitMarker), StorageError> {
    let loc = open(url, opts)?;
    let bytes = loc
        .read(COMMIT_MARKER)?
        .ok_or_else(|| StorageError::NotCommitted {
            url: loc.url.clone(),
        })?;
    let marker = serde_json::from_slice(&bytes).map_err(|e| StorageError::BadMarker {
        url: loc.url_of(COMMIT_MARKER),
        reason: e.to_string(),
    })?;
    Ok((loc, marker))
}

/// Downloads a committed dataset into `dir`, checking every file's sha256
/// against the commit marker; refuses a dataset without one.
pub fn pull(url: &str, dir: &Path, opts: &StoreOptions) -> Result<CommitMarker, StorageError> {
    let (loc, marker) = open_published(url, opts)?;
    for f in &marker.files {
        let dest = dir.join(&f.name);
        loc.download(&f.name, &dest)?;
        let got = crate::util::sha256_file(&dest).map_err(|source| StorageError::Io {
            path: dest.clone(),
            source,
        })?;
        if got != f.sha256 {
            let _ = std::fs::remove_file(&dest);
            return Err(StorageError::Checksum {
                url: loc.url_of(&f.name),
                expected: f.sha256.clone(),
                got,
            });
        }
    }
    Ok(marker)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A scratch space of `limit` bytes under a fresh folder named `name`.
    fn test_scratch(name: &str, limit: u64) -> (PathBuf, Arc<Scratch>) {
        let base = std::env::temp_dir().join(format!("{name}-{}", std::process::id()));
        let s = Arc::new(new_scratch(Some(&base), limit));
        (base, s)
    }

    /// A copy dropped while another is reserved but not yet written must
    /// leave the scratch folder in place: the other download is about to
    /// create its file there (a race seen with two decoding threads).
    #[test]
    fn scratch_folder_outlives_every_reserved_copy() {
        let (base, s) = test_scratch("actuary-scratch-test", 1000);
        let first = reserve(&s, 10, "a");
        std::fs::create_dir_all(&s.dir).unwrap();
        std::fs::write(first.path(), b"0123456789").unwrap();
        let second = reserve(&s, 10, "b");
        drop(first);
        assert!(s.dir.is_dir(), "folder removed under a reserved copy");
        std::fs::write(second.path(), b"0123456789").unwrap();
        drop(second);
        assert!(!s.dir.exists(), "the last copy leaves no folder behind");
        let used = s.used.lock().unwrap();
        assert_eq!((used.bytes, used.copies), (0, 0));
        drop(used);
        let _ = std::fs::remove_dir(&base);
    }

    /// A reservation over the free bytes waits until a copy is dropped.
    #[test]
    fn a_reservation_waits_for_room() {
        let (base, s) = test_scratch("actuary-scratch-wait", 15);
        let first = reserve(&s, 10, "a");
        let s2 = s.clone();
        let waiter = std::thread::spawn(move || {
            let c = reserve(&s2, 10, "b");
            c.fetched.as_ref().map(|f| f.1)
        });
        // The waiter cannot have reserved yet: 10 + 10 > 15 while `first` lives.
        assert_eq!(s.used.lock().unwrap().bytes, 10);
        drop(first);
        assert_eq!(waiter.join().unwrap(), Some(10));
        assert_eq!(s.used.lock().unwrap().bytes, 0);
        let _ = std::fs::remove_dir_all(&base);
    }
}
