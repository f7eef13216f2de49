//! Creating a workspace's records at the first run (campaign row, points, start files) and,
//! at every later run, settling which revision of the campaign file it goes on under.

use super::*;

/// A random-enough workspace id: BLAKE3 of time, pid and path.
pub(super) fn new_workspace_id(root: &Path) -> String {
    let seed = format!(
        "{}-{}-{}",
        Utc::now().timestamp_nanos_opt().unwrap_or(0),
        std::process::id(),
        root.display()
    );
    blake3::hash(seed.as_bytes()).to_hex()[..16].to_string()
}

/// Create the workspace records of a campaign (first run) or check that an existing
/// workspace belongs to this campaign file. Start files are hashed before anything is
/// written, so a missing start file leaves no workspace behind.
///
/// An edited campaign file is classified against the latest revision (`revise`): refused
/// with the diff when it changes the physics and `accept` is not given, else recorded as
/// the next revision before anything runs.
pub async fn prepare_workspace(
    campaign: &Campaign,
    paths: &Paths,
    accept: bool,
) -> Result<PreparedWorkspace> {
    for (name, file) in &campaign.start {
        if !file.is_file() && !file.is_dir() {
            bail!(
                "{}: start file `{name}` ({}) does not exist; fix `start:` or create the file",
                campaign.file.display(),
                file.display()
            );
        }
    }
    refuse_read_only(&paths.root)?;
    refuse_lost_database(paths)?;
    store::refuse_damaged(&paths.db).await?;
    std::fs::create_dir_all(&paths.root)
        .with_context(|| format!("{}: cannot create the workspace", paths.root.display()))?;
    let lock = store::lock(&paths.root)?;
    let ended_cleanly = store::seal::matches(&paths.db);
    // From here the database may be written: only a clean end seals it again.
    store::seal::break_seal(&paths.db)
        .with_context(|| format!("{}: cannot remove the seal", paths.db.display()))?;
    let pool = store::open(&paths.db).await?;
    let artifacts = ArtifactStore::open(&paths.store).with_context(|| {
        format!(
            "{}: cannot create the artifact store",
            paths.store.display()
        )
    })?;
    let hash = spec_hash(&campaign.text);
    let mut revised = super::revise::Revised {
        number: 1,
        points: campaign.points.clone(),
    };
    let workspace_id = match store::campaign_row(&pool).await? {
        Some(row) => {
            let at = super::revise::StoreAt {
                artifacts: &artifacts,
                scratch: &paths.scratch,
            };
            revised = super::revise::settle_revision(&pool, &at, campaign, accept).await?;
            row.workspace_id
        }
        None => {
            let workspace_id = new_workspace_id(&paths.root);
            let mut starts = Vec::new();
            for (name, file) in &campaign.start {
                let mut fname = file
                    .file_name()
                    .map(|f| f.to_string_lossy().into_owned())
                    .unwrap_or_else(|| name.clone());
                // A start folder is stored as a folder artifact (its files copied in).
                let (h, size) = if file.is_dir() {
                    fname.push('/');
                    let f = artifacts.put_folder(file, false).map_err(|e| match e {
                        // What the folder holds is the input's fault (exit 2).
                        crate::artifacts::FolderError::Refused(m) => anyhow::Error::new(
                            crate::spec::BadInput(format!("start folder `{name}`: {m}")),
                        ),
                        crate::artifacts::FolderError::Io(e) => anyhow::anyhow!(
                            "{}: cannot store the start folder: {e}",
                            file.display()
                        ),
                    })?;
                    (f.hash, f.size)
                } else {
                    artifacts.put_file(file).with_context(|| {
                        format!("{}: cannot store the start file", file.display())
                    })?
                };
                starts.push((name.clone(), h, size, fname));
            }
            store::campaign::create(
                &pool,
                store::campaign::NewCampaign {
                    name: &campaign.name,
                    spec_path: campaign.file.display().to_string(),
                    spec_text: &campaign.text,
                    spec_blake3: &hash,
                    workspace_id: &workspace_id,
                    points: campaign
                        .points
                        .iter()
                        .map(|p| (p.id.clone(), p.index as i64, values_json(p).to_string()))
                        .collect(),
                    starts,
                },
            )
            .await?;
            workspace_id
        }
    };
    Ok(PreparedWorkspace {
        pool,
        artifacts,
        workspace_id,
        revision: revised.number,
        points: revised.points,
        ended_cleanly,
        _lock: lock,
    })
}

/// An existing workspace folder that cannot be written (a read-only mount, another user's
/// folder) is refused before anything is tried, with what to do instead.
fn refuse_read_only(root: &Path) -> Result<()> {
    if !root.is_dir() || store::writable(root) {
        return Ok(());
    }
    let why = std::io::Error::last_os_error();
    bail!(
        "{}: the workspace cannot be written here ({why}; a read-only mount, or a folder of \
         another user): `rondo run` records every step in it. Run it where the workspace is \
         writable, or copy it (cp -a) to a writable place and run with --workspace COPY; \
         `rondo status`, `trace`, `diff` and `export` read it as it is",
        root.display()
    )
}

/// A workspace whose artifact store holds files but whose `rondo.db` is gone has lost its
/// records: starting afresh there would record a second campaign over the first one's
/// artifacts, so it is refused before anything is written.
fn refuse_lost_database(paths: &Paths) -> Result<()> {
    if paths.db.exists() {
        return Ok(());
    }
    let stored = std::fs::read_dir(&paths.store)
        .map(|mut d| d.next().is_some())
        .unwrap_or(false);
    if stored {
        bail!(
            "{}: the workspace database {} is missing but its artifact store ({}) is not \
             empty: the records of this workspace are lost (the store cannot be indexed back). \
             Restore rondo.db from a backup, or run the campaign in a new workspace \
             (--workspace NEW); rondo wrote nothing here",
            paths.root.display(),
            paths.db.display(),
            paths.store.display()
        );
    }
    Ok(())
}

/// An open, locked workspace.
pub struct PreparedWorkspace {
    /// The database.
    pub pool: SqlitePool,
    /// The artifact store.
    pub artifacts: ArtifactStore,
    /// The id children are tagged with.
    pub workspace_id: String,
    /// The campaign file's revision this run goes on under.
    pub revision: i64,
    /// The campaign's points under that revision, with the store's ids.
    pub points: Vec<PointSpec>,
    /// Whether the last writer ended cleanly (its seal still matched): then no crash
    /// window is left open for this run to close.
    pub ended_cleanly: bool,
    _lock: store::WorkspaceLock,
}

/// Sweep values of a point as a JSON object.
pub fn values_json(p: &PointSpec) -> serde_json::Value {
    serde_json::Value::Object(
        p.values
            .iter()
            .map(|(k, v)| (k.clone(), v.to_json()))
            .collect(),
    )
}
