-- nearest_neighbours: the 10 nodes whose current vectors are closest (cosine) to one node's.
-- grain: one row per neighbour.
-- inputs: view embeddings (see graphkit.connect).
-- params: $node_id (text; ids are compared as text so integer and string ids both work).
-- From Python: graphkit.connect(store).execute(open(this_file).read(), {"node_id": "acct-10042"}).fetchall()
-- The catalog's macro does the same: select * from nearest_neighbours('acct-10042', 10)
with query as (
    select vector from embeddings where node_id::varchar = $node_id limit 1
),

final as (
    select e.node_id, e.node_kind, array_cosine_similarity(e.vector, q.vector) as similarity
    from embeddings as e, query as q
    where e.node_id::varchar <> $node_id
    order by similarity desc
    limit 10
)

select * from final
