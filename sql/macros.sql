-- macros: SQL helpers over the current embeddings, stored in the catalog.
-- grain: cosine_similarity: one value per pair of vectors; nearest_neighbours: one row per neighbour;
--        pair_similarity: one value per pair of node ids.
-- inputs: view embeddings (node_id, node_kind, provisional, vector FLOAT[dim]).
-- params: macro arguments; ids are compared as text, so integer and string ids both work.
create or replace macro cosine_similarity(a, b) as array_cosine_similarity(a, b);

create or replace macro nearest_neighbours(query_id, k) as table
    with query as (
        select vector from embeddings where node_id::varchar = query_id::varchar limit 1
    ),

    final as (
        select e.node_id, e.node_kind, array_cosine_similarity(e.vector, q.vector) as similarity
        from embeddings as e, query as q
        where e.node_id::varchar <> query_id::varchar
        order by similarity desc
        limit k
    )

    select * from final;

create or replace macro pair_similarity(a_id, b_id) as (
    select array_cosine_similarity(a.vector, b.vector)
    from embeddings as a, embeddings as b
    where a.node_id::varchar = a_id::varchar and b.node_id::varchar = b_id::varchar
    limit 1
);
