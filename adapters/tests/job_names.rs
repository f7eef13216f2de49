//! Batch job names as docs/clusters.md shows them: the example name in the document is the
//! form the engine builds (`<campaign>.<point>.i<iteration>.<stage>`, see
//! `orchestrator/src/engine.rs` and the Slurm end-to-end test `tests/slurm_e2e.rs`, which
//! checks it on a real scheduler), and it reaches `#SBATCH --job-name` and `#PBS -N`
//! unchanged. The replacement rules the document states for other characters are checked
//! here too.

use std::path::{Path, PathBuf};

use rondo_adapters::executor::Resources;
use rondo_adapters::pbs::pbs_directives;
use rondo_adapters::slurm::sbatch_directives;

fn clusters_md() -> (PathBuf, String) {
    let p = Path::new(env!("CARGO_MANIFEST_DIR")).join("../docs/clusters.md");
    let text = std::fs::read_to_string(&p).unwrap_or_else(|e| panic!("{}: {e}", p.display()));
    (p, text)
}

/// The job name the document gives as its example: the first backquoted word after
/// "batch job named after what it is, for example".
fn documented_example() -> String {
    let (p, text) = clusters_md();
    let flat = text.split_whitespace().collect::<Vec<_>>().join(" ");
    let key = "batch job named after what it is, for example `";
    let at = flat
        .find(key)
        .unwrap_or_else(|| panic!("{}: the job-name example sentence is gone", p.display()))
        + key.len();
    let end = flat[at..]
        .find('`')
        .unwrap_or_else(|| panic!("{}: unterminated job-name example", p.display()));
    flat[at..at + end].to_string()
}

fn slurm_name(job_name: &str) -> String {
    let d = sbatch_directives(&Resources::default(), None, job_name, "rondo:ws-1:7")
        .unwrap_or_else(|e| panic!("{job_name}: {e}"));
    d[0].strip_prefix("#SBATCH --job-name=")
        .unwrap_or_else(|| panic!("first directive is not the job name: {d:?}"))
        .to_string()
}

fn pbs_name(job_name: &str) -> String {
    let d = pbs_directives(
        &Resources::default(),
        None,
        job_name,
        Path::new("/scratch/a7"),
    )
    .unwrap_or_else(|e| panic!("{job_name}: {e}"));
    d[0].strip_prefix("#PBS -N ")
        .unwrap_or_else(|| panic!("first directive is not the job name: {d:?}"))
        .to_string()
}

#[test]
fn the_documented_example_has_the_engines_form() {
    let ex = documented_example();
    let parts: Vec<&str> = ex.split('.').collect();
    assert_eq!(parts.len(), 4, "{ex}: campaign.point.iN.stage");
    let (campaign, point, iteration, stage) = (parts[0], parts[1], parts[2], parts[3]);
    // campaign names: letters, digits, '-' and '_' (the campaign file's check)
    assert!(
        !campaign.is_empty()
            && campaign
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_'),
        "{ex}: campaign part {campaign:?}"
    );
    // point ids are p + zero-padded index (p001 …)
    assert!(
        point.len() > 1 && point.starts_with('p') && point[1..].chars().all(|c| c.is_ascii_digit()),
        "{ex}: point part {point:?}"
    );
    assert!(
        iteration.len() > 1
            && iteration.starts_with('i')
            && iteration[1..].chars().all(|c| c.is_ascii_digit()),
        "{ex}: iteration part {iteration:?}"
    );
    assert!(!stage.is_empty(), "{ex}: stage part");
    assert!(
        !ex.contains('/'),
        "{ex}: the engine joins with dots, not slashes"
    );
}

#[test]
fn the_documented_example_reaches_both_batch_systems_unchanged() {
    let ex = documented_example();
    assert_eq!(slurm_name(&ex), ex);
    assert_eq!(pbs_name(&ex), ex);
    let d = sbatch_directives(&Resources::default(), None, &ex, "rondo:ws-1:7").expect("ok");
    assert!(
        d.contains(&"#SBATCH --comment=rondo:ws-1:7".to_string()),
        "{d:?}"
    );
}

#[test]
fn other_characters_are_replaced_as_documented() {
    // Slurm keeps `._-/:+=`, anything else becomes `_`
    assert_eq!(
        slurm_name("collapse-scan.p003.i3.dft scf/run+1=a:b"),
        "collapse-scan.p003.i3.dft_scf/run+1=a:b"
    );
    assert_eq!(slurm_name("c.p001.i1.stufe#ä"), "c.p001.i1.stufe__");
    // at most 120 characters
    assert_eq!(
        slurm_name(&format!("c.p001.i1.{}", "s".repeat(200))).len(),
        120
    );
    // PBS keeps `_.+-`, `/` becomes `.`, anything else `_`, and the name starts with a letter
    assert_eq!(
        pbs_name("collapse-scan.p003.i3.dft scf/run"),
        "collapse-scan.p003.i3.dft_scf.run"
    );
    assert_eq!(pbs_name("3scan.p001.i1.band"), "r3scan.p001.i1.band");
    // the allocation job of `rondo submit`
    assert_eq!(
        slurm_name("collapse-scan.allocation"),
        "collapse-scan.allocation"
    );
}
