-- The portfolios that are evaluated: a window, no row errors, a policy in force throughout,
-- and no whole-input problem anywhere (then none is). has_segments / has_reported say
-- whether the portfolio gave any segment / reported return; return_source is the return
-- linked and reported: 'reported', else 'segments', else 'index'.
with windows as (
    select * from int_portfolio_windows_spanned
),

policy_gaps as (
    select * from int_policy_gaps_found
),

shared_issues as (
    select * from int_shared_issues_found
),

segment_returns as (
    select * from stg_segment_returns
),

portfolio_returns as (
    select * from stg_portfolio_returns
),

shared_count as (
    select count(*) as n_shared_issues
    from shared_issues
),

segment_portfolios as (
    select distinct portfolio_id
    from segment_returns
),

reported_portfolios as (
    select distinct portfolio_id
    from portfolio_returns
),

evaluated as (
    select
        w.portfolio_id,
        s.portfolio_id is not null as has_segments,
        r.portfolio_id is not null as has_reported,
        case
            when r.portfolio_id is not null then 'reported'
            when s.portfolio_id is not null then 'segments'
            else 'index'
        end as return_source
    from windows as w
    cross join shared_count as n
    left join policy_gaps as g
        on w.portfolio_id = g.portfolio_id
    left join segment_portfolios as s
        on w.portfolio_id = s.portfolio_id
    left join reported_portfolios as r
        on w.portfolio_id = r.portfolio_id
    where n.n_shared_issues = 0 and g.portfolio_id is null
)

select * from evaluated
