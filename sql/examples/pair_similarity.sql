-- pair_similarity: cosine similarity of the current vectors of two nodes, e.g. a sender and a receiver
-- about to be linked by a new transfer.
-- grain: one row.
-- inputs: view embeddings.
-- params: $a, $b (node ids as text).
with a as (
    select vector from embeddings where node_id::varchar = $a limit 1
),

b as (
    select vector from embeddings where node_id::varchar = $b limit 1
),

final as (
    select $a as a, $b as b, array_cosine_similarity(a.vector, b.vector) as similarity
    from a, b
)

select * from final
