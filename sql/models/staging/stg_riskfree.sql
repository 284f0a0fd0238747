-- riskfree as given (optional; an empty relation when not given): the riskless return of
-- each period. The decomposition does not use it; it is checked like index_returns, as the
-- local engine does. Rename and cast only.
with source as (
    select * from riskfree
),

renamed as (
    select
        cast(period_end as date) as period_end,
        cast("return" as double) as riskfree_return
    from source
)

select * from renamed
