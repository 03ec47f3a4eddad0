//! `list_days` lists the folder of a location's prefix, also for a location derived from
//! another by a longer prefix (as the audit's `snapshots/` and `labels/` are), whose
//! `local_dir` may still name the parent folder.

use daymark_store::{list_days, resolve};

#[tokio::test]
async fn a_derived_location_lists_its_own_folder() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    for f in [
        "snapshots/dt=2026-01-01/part-0.parquet",
        "snapshots/dt=2026-01-02/part-0.parquet",
        "tiles/plays/abc/dt=2026-01-01/part-0.parquet",
    ] {
        let p = out.join(f);
        std::fs::create_dir_all(p.parent().unwrap()).unwrap();
        std::fs::write(p, b"x").unwrap();
    }
    let parent = resolve(out.to_str().unwrap(), None).unwrap();
    let snapshots = daymark_store::Location {
        prefix: parent.prefix.clone().join("snapshots"),
        ..parent.clone()
    };
    let listing = list_days(&snapshots, "dt").await.unwrap();
    let days: Vec<String> = listing.days.keys().map(|d| d.to_string()).collect();
    assert_eq!(days, ["2026-01-01", "2026-01-02"]);
    assert!(listing.ignored.is_empty(), "{:?}", listing.ignored);
    let first = &listing.days.values().next().unwrap()[0];
    assert!(
        first
            .path
            .as_ref()
            .ends_with("out/snapshots/dt=2026-01-01/part-0.parquet"),
        "{}",
        first.path
    );
    // The parent itself has no day partitions at its top.
    assert!(list_days(&parent, "dt").await.unwrap().days.is_empty());
}
