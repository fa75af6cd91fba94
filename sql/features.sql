-- features: an entity table with each row's vector, for downstream models (graphkit.features.export_features
-- spreads the vector into float columns emb_000 ... and writes the file).
-- grain: one row per entity row, in the entity table's order; entities without a vector keep their row, with a
--        null __vector.
-- inputs: view entities (the entity table plus __entity_row, its row number, and __entity_key, its id column
--         as text), view vectors (node_id, node_kind, vector FLOAT[dim] of the version).
-- params: $kind (text or null: only nodes of this kind).
with keyed as (
    select node_id::varchar as node_key, vector
    from vectors
    where $kind::varchar is null or node_kind = $kind
),

final as (
    select e.* exclude (__entity_row, __entity_key), k.vector as __vector
    from entities as e
    left join keyed as k on k.node_key = e.__entity_key
    order by e.__entity_row
)

select * from final
