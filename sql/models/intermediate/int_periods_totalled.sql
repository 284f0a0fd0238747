-- One row per evaluated portfolio and period: the policy return, the computed return
-- sum_i w r (segment return, else index return), the return linked (the reported one where
-- given, else the computed one), the effects summed over classes, and the residual
-- (linked - computed). Selection (and interaction, form 'bhb') are null for a portfolio
-- without segment returns; classes with a missing segment return count as 0 in the sum.
with effects as (
    select * from int_effects_decomposed
),

periods as (
    select * from int_portfolio_periods_listed
),

evaluated as (
    select * from int_portfolios_evaluated
),

portfolio_returns as (
    select * from stg_portfolio_returns
),

run_options as (
    select * from stg_run_options
),

class_sums as (
    select
        portfolio_id,
        period_index,
        max(policy_return) as policy_return,
        sum(static_allocation) as static_allocation,
        sum(timing) as timing,
        sum(selection) as known_selection,
        sum(interaction) as known_interaction,
        sum(weighted_return) as computed_return,
        sum(case when is_segment_missing then 1 else 0 end) as n_selection_missing
    from effects
    group by portfolio_id, period_index
),

totalled as (
    select
        p.portfolio_id,
        p.period_index,
        p.period_start,
        p.period_end,
        e.return_source,
        case
            when e.has_reported and r.reported_return is not null then r.reported_return
            else s.computed_return
        end as portfolio_return,
        s.computed_return,
        s.policy_return,
        s.static_allocation,
        s.timing,
        case
            when e.has_segments then coalesce(s.known_selection, cast(0 as double))
            else cast(null as double)
        end as selection,
        case
            when e.has_segments and o.form = 'bhb'
                then coalesce(s.known_interaction, cast(0 as double))
            else cast(null as double)
        end as interaction,
        not p.is_holding as is_drifted,
        cast(s.n_selection_missing as bigint) as n_selection_missing,
        e.has_reported and r.reported_return is null as is_reported_missing
    from periods as p
    inner join evaluated as e
        on p.portfolio_id = e.portfolio_id
    inner join class_sums as s
        on p.portfolio_id = s.portfolio_id and p.period_index = s.period_index
    cross join run_options as o
    left join portfolio_returns as r
        on p.portfolio_id = r.portfolio_id and p.period_end = r.period_end
),

with_residual as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        return_source,
        portfolio_return,
        computed_return,
        policy_return,
        portfolio_return - policy_return as active_return,
        static_allocation,
        timing,
        selection,
        interaction,
        portfolio_return - computed_return as residual,
        is_drifted,
        n_selection_missing,
        is_reported_missing
    from totalled
)

select * from with_residual
