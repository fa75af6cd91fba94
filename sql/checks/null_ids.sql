-- null_ids: example rows with a null source or target id.
-- grain: one row per offending edge row, at most 5.
-- inputs: table windowed (see windowed_edges.sql).
-- params: none.
with final as (
    select table_path, src, dst
    from windowed
    where src is null or dst is null
    limit 5
)

select * from final
