-- nearest_neighbours: the 10 nodes whose current vectors are closest (cosine) to one node's.
-- grain: one row per neighbour.
-- inputs: view embeddings.
-- params: $node_id (text; compared with the id as text so int and string ids both work).
-- Run: graphkit sql STORE "$(cat sql/examples/nearest_neighbours.sql)"  after replacing $node_id, or bind it
--      from Python: graphkit.connect(store).execute(text, {"node_id": "acct-10042"}).fetchall()
with query as (
    select vector from embeddings where node_id::varchar = $node_id
),

final as (
    select e.node_id, array_cosine_similarity(e.vector, q.vector) as similarity
    from embeddings as e, query as q
    where e.node_id::varchar <> $node_id
    order by similarity desc
    limit 10
)

select * from final
