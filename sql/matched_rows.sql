-- matched_rows: the rows of the current version that a new version shares, for warm start, drift and alignment
-- (graphkit.store.align.match_current).
-- grain: one row per new row whose (node_kind, node_id) has a trained (not provisional) row in the current
--        version, in new-row order.
-- inputs: relation new_keys (node_kind, node_id, new_row: the new version's keys), view prev (the current
--         version's Parquet file with its file_row_number).
-- params: none.
with final as (
    select n.new_row, p.file_row_number::bigint as old_row
    from new_keys as n
    join prev as p on p.node_kind = n.node_kind and p.node_id = n.node_id
    where not p.provisional
    order by n.new_row
)

select * from final
