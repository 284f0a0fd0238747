-- Portfolios with a period of their window that no policy row set covers: one
-- `no_policy_in_force` error each (the portfolio is skipped), naming the first such period.
with periods as (
    select * from int_portfolio_periods_listed
),

uncovered as (
    select
        portfolio_id,
        count(*) as n_uncovered,
        min(period_start) as first_start
    from periods
    where policy_effective_from is null
    group by portfolio_id
),

policy_gaps as (
    select
        portfolio_id,
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'error' as severity,
        'no_policy_in_force' as code,
        'policy: portfolio ' || portfolio_id || ': no policy row set is in force for '
        || cast(n_uncovered as varchar) || ' period(s), the first starting '
        || cast(first_start as varchar)
        || '; a set applies to periods starting on or after its effective_from.' as message
    from uncovered
)

select * from policy_gaps
