-- One row per evaluated portfolio, period of its window and class of its universe, with
-- the reported weight on holdings dates (rescaled to sum to exactly 1 per portfolio and
-- date; 0 for a class not reported that date; null between holdings dates), the policy
-- weight in force (0 for a class not in the set), the index return, the segment return
-- (null where not given) and the return that grows the weights between holdings dates (the
-- segment return, else the index return).
with periods as (
    select * from int_portfolio_periods_listed
),

evaluated as (
    select * from int_portfolios_evaluated
),

universe as (
    select * from int_class_universe_listed
),

holdings as (
    select * from int_holdings_placed_on_calendar
),

policy_sets as (
    select * from int_policy_sets_rescaled
),

index_returns as (
    select * from stg_index_returns
),

segment_returns as (
    select * from stg_segment_returns
),

holdings_totals as (
    select
        portfolio_id,
        period_index,
        sum(weight) as total_weight
    from holdings
    where period_index is not null
    group by portfolio_id, period_index
),

grid as (
    select
        p.portfolio_id,
        p.period_index,
        p.period_start,
        p.period_end,
        p.is_holding,
        p.policy_effective_from,
        u.asset_class,
        e.has_segments
    from periods as p
    inner join evaluated as e
        on p.portfolio_id = e.portfolio_id
    inner join universe as u
        on p.portfolio_id = u.portfolio_id
),

densified as (
    select
        g.portfolio_id,
        g.period_index,
        g.period_start,
        g.period_end,
        g.asset_class,
        g.is_holding,
        g.has_segments,
        case
            when not g.is_holding then cast(null as double)
            when h.weight is null or t.total_weight = 0 then cast(0 as double)
            else h.weight / t.total_weight
        end as held_weight,
        coalesce(q.policy_weight, cast(0 as double)) as policy_weight,
        i.index_return,
        s.segment_return,
        coalesce(s.segment_return, i.index_return) as growth_return
    from grid as g
    inner join index_returns as i
        on g.period_end = i.period_end and g.asset_class = i.asset_class
    left join holdings as h
        on
            g.portfolio_id = h.portfolio_id
            and g.period_index = h.period_index
            and g.asset_class = h.asset_class
    left join holdings_totals as t
        on g.portfolio_id = t.portfolio_id and g.period_index = t.period_index
    left join policy_sets as q
        on
            g.portfolio_id = q.portfolio_id
            and g.policy_effective_from = q.effective_from
            and g.asset_class = q.asset_class
    left join segment_returns as s
        on
            g.portfolio_id = s.portfolio_id
            and g.period_end = s.period_end
            and g.asset_class = s.asset_class
)

select * from densified
