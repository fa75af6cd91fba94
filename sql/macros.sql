-- macros: SQL helpers over the current embeddings, stored in the catalog (and made afresh, as temporary macros,
-- on every graphkit.connect connection, so that a catalog written by an older graphkit gets these definitions).
-- grain: cosine_similarity: one value per pair of vectors; nearest_neighbours: one row per neighbour;
--        pair_similarity: one value per pair of node ids.
-- inputs: view embeddings (node_id, node_kind, provisional, vector FLOAT[dim]).
-- params: macro arguments; ids are compared as text, so integer and string ids both work.
--
-- nearest_neighbours is graphkit's one nearest-neighbour query: `graphkit similar` and
-- sql/examples/nearest_neighbours.sql call it. The query node is the row with that id (of kind id_kind when
-- given; an id under several kinds without id_kind is an error); it is left out of its own neighbours; kind keeps
-- only neighbours of that kind; ties are broken by node_id, then node_kind.
create or replace macro cosine_similarity(a, b) as array_cosine_similarity(a, b);

create or replace macro nearest_neighbours(query_id, k, kind := null, id_kind := null) as table
    with query as (
        select node_kind, vector, count(*) over () as n_kinds
        from embeddings
        where node_id::varchar = query_id::varchar and (id_kind is null or node_kind = id_kind)
    ),

    final as (
        select e.node_id, e.node_kind, array_cosine_similarity(e.vector, q.vector) as similarity
        from embeddings as e, query as q
        where not (e.node_id::varchar = query_id::varchar and e.node_kind = q.node_kind)
          and (kind is null or e.node_kind = kind)
          and (q.n_kinds = 1
               or error('node id ' || query_id::varchar || ' exists under several kinds; pass id_kind'))
        order by similarity desc, e.node_id, e.node_kind
        limit k
    )

    select * from final;

create or replace macro pair_similarity(a_id, b_id) as (
    select array_cosine_similarity(a.vector, b.vector)
    from embeddings as a, embeddings as b
    where a.node_id::varchar = a_id::varchar and b.node_id::varchar = b_id::varchar
    limit 1
);
