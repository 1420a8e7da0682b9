use super::*;

#[test]
fn captions_are_stored_once_and_vectors_once_per_digest() {
    let dir = tempfile::tempdir().unwrap();
    let store = CaptionStore::open(&dir.path().join("bank.sqlite")).unwrap();
    let v = [0.6f32, 0.8];
    let rows = [
        StoreRow {
            text: "a red cube",
            tag: Some("blocks"),
            vector: Some(&v),
        },
        StoreRow {
            text: "a red cube",
            tag: Some("mine"),
            vector: Some(&v),
        },
    ];
    let out = store.append("d1", &rows).unwrap();
    assert_eq!(
        out[0],
        Stored {
            id: out[0].id,
            new_caption: true,
            new_vector: true
        }
    );
    assert_eq!(
        out[1],
        Stored {
            id: out[0].id,
            new_caption: false,
            new_vector: false
        }
    );
    let again = store.append("d2", &rows[..1]).unwrap();
    assert_eq!(
        again[0],
        Stored {
            id: out[0].id,
            new_caption: false,
            new_vector: true
        }
    );

    let c = store.caption_by_text("a red cube").unwrap().unwrap();
    assert_eq!(c.tags, vec!["blocks".to_string(), "mine".to_string()]);
    assert_eq!(
        store.has_vector("d1", &["a red cube", "other"]).unwrap(),
        vec![true, false]
    );
    let mut seen = Vec::new();
    store
        .each_row("d1", &mut |id, v| seen.push((id, v.to_vec())))
        .unwrap();
    assert_eq!(seen, vec![(c.id, vec![0.6, 0.8])]);
    assert_eq!(store.integrity_check().unwrap(), vec!["ok".to_string()]);
    let counts = store.counts().unwrap();
    assert_eq!(counts.captions, 1);
    assert_eq!(counts.vectors, vec![("d1".into(), 1), ("d2".into(), 1)]);
}

#[test]
fn reopening_keeps_everything_and_newer_schemas_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("bank.sqlite");
    {
        let store = CaptionStore::open(&path).unwrap();
        store
            .append(
                "d",
                &[StoreRow {
                    text: "x",
                    tag: None,
                    vector: None,
                }],
            )
            .unwrap();
    }
    let store = CaptionStore::open(&path).unwrap();
    assert_eq!(store.without_vector("d", 0, 10).unwrap().len(), 1);
    drop(store);
    let conn = Connection::open(&path).unwrap();
    conn.pragma_update(None, "user_version", 99).unwrap();
    drop(conn);
    assert!(matches!(
        CaptionStore::open(&path),
        Err(StoreError::NewerSchema { found: 99, .. })
    ));
}
