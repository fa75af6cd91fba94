-- export: a version's vectors as `graphkit export` writes them to a Parquet or CSV file.
-- grain: one row per node of the version.
-- inputs: view embeddings (graphkit.connect, pointed at the version asked for).
-- params: none.
with final as (
    select node_id, node_kind, vector
    from embeddings
)

select * from final
