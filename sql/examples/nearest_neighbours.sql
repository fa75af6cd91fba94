-- nearest_neighbours: the 10 nodes whose current vectors are closest (cosine) to one node's.
-- grain: one row per neighbour, most similar first (ties by node_id, then node_kind).
-- inputs: view embeddings (see graphkit.connect) and the catalog's nearest_neighbours macro (sql/macros.sql),
--         the same query `graphkit similar` runs.
-- params: $node_id (text; ids are compared as text so integer and string ids both work); $kind (text: only
--         neighbours of this kind, '' for every kind); $id_kind (text: the query node's kind when its id exists
--         under several kinds, '' otherwise).
-- From the shell: graphkit sql STORE --file sql/examples/nearest_neighbours.sql --param node_id=acct-10042
--                 --param kind=merchant --param id_kind=
-- From Python: graphkit.connect(store).execute(open(this_file).read(),
--                                              {"node_id": "acct-10042", "kind": "", "id_kind": ""}).fetchall()
with final as (
    select node_id, node_kind, similarity
    from nearest_neighbours($node_id, 10, kind := nullif($kind, ''), id_kind := nullif($id_kind, ''))
)

select * from final
