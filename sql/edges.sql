-- edges: the cleaned edge table in original node ids.
-- grain: one row per distinct (src_kind, src, dst_kind, dst); for an undirected graph one row per unordered
--        pair, the smaller (kind, id) first.
-- inputs: table windowed (see windowed_edges.sql).
-- params: $directed (boolean), $half_life_days (double or null: no decay), $as_of (timestamptz: age reference).
-- Rows with a null id and self-loops are dropped (counted by checks/edge_counts); duplicates are merged by
-- summing their weights, each first halved for every half_life_days of age.
with valid as (
    select src_kind, src, dst_kind, dst, weight, ts
    from windowed
    where src is not null and dst is not null and not (src_kind = dst_kind and src = dst)
),

decayed as (
    select
        src_kind, src, dst_kind, dst,
        case
            when $half_life_days::double is null or ts is null then weight
            else weight * pow(0.5, greatest(epoch($as_of::timestamptz) - epoch(ts), 0)
                                   / 86400.0 / $half_life_days::double)
        end as weight
    from valid
),

oriented as (
    select
        (src_kind < dst_kind or (src_kind = dst_kind and src <= dst)) or $directed as keep_order,
        *
    from decayed
),

flipped as (
    select
        case when keep_order then src_kind else dst_kind end as src_kind,
        case when keep_order then src else dst end as src,
        case when keep_order then dst_kind else src_kind end as dst_kind,
        case when keep_order then dst else src end as dst,
        weight
    from oriented
),

final as (
    select src_kind, src, dst_kind, dst, sum(weight)::double as weight, count(*) as n_rows
    from flipped
    group by src_kind, src, dst_kind, dst
)

select * from final
