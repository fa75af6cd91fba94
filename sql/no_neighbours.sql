-- no_neighbours: the view `neighbours` of a read-only connection (graphkit.connect) opened on a version that was
-- published without `[store] neighbours`: it shadows the catalog's view of the current version's table, and
-- reading it fails with a message saying why, instead of showing another version's neighbours.
-- grain: none (reading it is an error).
-- inputs: none.
-- params: $message (text), written in by graphkit.sql.inline, quoted.
create or replace temp view neighbours as
with final as (
    select null::varchar as node_id, null::varchar as node_kind, null::varchar as neighbour_id,
           null::varchar as neighbour_kind, null::integer as rank, null::float as similarity
    where error($message)
)
select * from final
