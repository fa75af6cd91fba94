-- shared_neighbours: nodes among the 50 nearest neighbours of both $a and $b, with both similarities;
-- a common use is to explain why two accounts look alike.
-- grain: one row per node close to both.
-- inputs: view embeddings.
-- params: $a, $b (node ids as text).
with a as (
    select vector from embeddings where node_id::varchar = $a limit 1
),

b as (
    select vector from embeddings where node_id::varchar = $b limit 1
),

near_a as (
    select e.node_id, e.node_kind, array_cosine_similarity(e.vector, a.vector) as similarity_a
    from embeddings as e, a
    where e.node_id::varchar not in ($a, $b)
    order by similarity_a desc
    limit 50
),

near_b as (
    select e.node_id, e.node_kind, array_cosine_similarity(e.vector, b.vector) as similarity_b
    from embeddings as e, b
    where e.node_id::varchar not in ($a, $b)
    order by similarity_b desc
    limit 50
),

final as (
    select near_a.node_id, near_a.node_kind, similarity_a, similarity_b
    from near_a
    join near_b on near_a.node_id = near_b.node_id and near_a.node_kind = near_b.node_kind
    order by similarity_a + similarity_b desc
)

select * from final
