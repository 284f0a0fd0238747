-- One row per portfolio and period of its window: whether the period starts at a holdings
-- date (else its weights drift) and which policy row set is in force (the latest
-- effective_from on or before the period's start; null when none is).
with windows as (
    select * from int_portfolio_windows_spanned
),

holdings_dates as (
    select * from int_holdings_dates_spaced
),

calendar as (
    select * from int_calendar_inferred
),

policy as (
    select * from stg_policy
),

policy_sets as (
    select distinct
        portfolio_id,
        effective_from
    from policy
    where portfolio_id is not null and effective_from is not null
),

window_periods as (
    select
        w.portfolio_id,
        c.period_index,
        c.period_start,
        c.period_end,
        d.period_index is not null as is_holding
    from windows as w
    inner join calendar as c
        on c.period_index between w.first_index and w.last_index
    left join holdings_dates as d
        on w.portfolio_id = d.portfolio_id and c.period_index = d.period_index
),

in_force as (
    select
        p.portfolio_id,
        p.period_index,
        max(s.effective_from) as policy_effective_from
    from window_periods as p
    left join policy_sets as s
        on p.portfolio_id = s.portfolio_id and s.effective_from <= p.period_start
    group by p.portfolio_id, p.period_index
),

listed as (
    select
        p.portfolio_id,
        p.period_index,
        p.period_start,
        p.period_end,
        p.is_holding,
        f.policy_effective_from
    from window_periods as p
    inner join in_force as f
        on p.portfolio_id = f.portfolio_id and p.period_index = f.period_index
)

select * from listed
