-- One line per portfolio with its linked split and the count of data issues by severity.
with summary as (
    select * from summary
),

data_issues as (
    select * from data_issues
),

issue_counts as (
    select
        portfolio_id,
        sum(case when severity = 'error' then 1 else 0 end) as n_errors,
        sum(case when severity = 'warning' then 1 else 0 end) as n_warnings
    from data_issues
    group by portfolio_id
),

overview as (
    select
        s.portfolio_id,
        s.n_periods,
        s.return_source,
        s.active_return,
        s.static_allocation,
        s.timing,
        s.selection,
        s.residual,
        coalesce(i.n_errors, 0) as n_errors,
        coalesce(i.n_warnings, 0) as n_warnings
    from summary as s
    left join issue_counts as i on s.portfolio_id = i.portfolio_id
)

select * from overview
