-- version_kinds: the node kinds a version holds (graphkit.features refuses a kind that is not there, and needs
-- one when there are several).
-- grain: one row per node kind, in order.
-- inputs: view vectors (node_id, node_kind, vector of the version).
-- params: none.
with final as (
    select distinct node_kind
    from vectors
    order by node_kind
)

select * from final
