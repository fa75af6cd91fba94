-- labelled_nodes: the labels table's rows mapped onto the graph's node indices (for node classification).
-- grain: one row per labels row with both an id and a label, in the labels table's order; node_idx is -1 for an
--        id the graph does not have (or has only under another kind).
-- inputs: view labels (label_row, its row number; label_node_id and label, as text), view nodes (the ingest's
--         nodes.parquet: node_idx, node_id, node_kind).
-- params: $kind (text or null: only nodes of this kind match).
with matched as (
    select l.label_row, coalesce(n.node_idx, -1) as node_idx, l.label
    from labels as l
    left join nodes as n
        on n.node_id::varchar = l.label_node_id
        and ($kind::varchar is null or n.node_kind = $kind)
    where l.label is not null and l.label_node_id is not null
)

select node_idx, label
from matched
order by label_row
