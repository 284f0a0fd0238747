-- The policy row sets (portfolio, effective_from), each rescaled to sum to exactly 1 (they
-- sum to 1 within weight_tolerance once checked), so the effects add up exactly.
with policy as (
    select * from stg_policy
),

set_totals as (
    select
        portfolio_id,
        effective_from,
        sum(policy_weight) as total_weight
    from policy
    where portfolio_id is not null and effective_from is not null
    group by portfolio_id, effective_from
),

rescaled as (
    select
        p.portfolio_id,
        p.effective_from,
        p.asset_class,
        case
            when t.total_weight = 0 then cast(0 as double)
            else p.policy_weight / t.total_weight
        end as policy_weight
    from policy as p
    inner join set_totals as t
        on p.portfolio_id = t.portfolio_id and p.effective_from = t.effective_from
)

select * from rescaled
