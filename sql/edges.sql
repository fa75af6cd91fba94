-- edges: the cleaned edge table in original node ids.
-- grain: one row per distinct (src, dst); for an undirected graph one row per unordered pair, with src <= dst.
-- inputs: view raw_edges(src, dst, weight) projected from the configured edge table.
-- params: $directed (boolean).
-- Rows with a null id and self-loops are dropped (counted by checks/edge_counts); duplicates are merged by
-- summing their weights.
with valid as (
    select src, dst, weight
    from raw_edges
    where src is not null and dst is not null and src <> dst
),

oriented as (
    select
        case when $directed or src <= dst then src else dst end as src,
        case when $directed or src <= dst then dst else src end as dst,
        weight
    from valid
),

final as (
    select src, dst, sum(weight)::double as weight, count(*) as n_rows
    from oriented
    group by src, dst
)

select * from final
